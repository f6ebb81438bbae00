"""``python -m seqstate``: the same command line as the ``seqstate`` script."""

from seqstate.launch import main

main()

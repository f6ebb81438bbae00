"""seqstate: hidden Markov model annotation of genomic DNA from plain parameter tables."""

__version__ = "0.1.0"

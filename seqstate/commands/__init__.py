"""The commands of seqstate: one module (or package) per command, called by the CLI."""

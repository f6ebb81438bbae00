"""The commands of seqstate as library calls: options object in, report dataclass out."""

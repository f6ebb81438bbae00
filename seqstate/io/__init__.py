"""Readers and writers for the file formats seqstate reads and writes."""

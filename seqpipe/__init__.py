"""seqpipe: raw text to verified, sharded token datasets and reproducible training batches."""

__version__ = "0.1.0"

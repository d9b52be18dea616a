"""The codec contract, the built-in checkpoint format, its architecture and tokenizers."""

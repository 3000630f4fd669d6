"""Curating corpora: audit, leak-free splits and widening where a corpus is thin."""

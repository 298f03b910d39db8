"""Independent test corpora (sox, an integrated Lavet motor): see README.md.  No tickscope imports."""

"""The invented demo registry's content (see README.md here): import files, not code."""

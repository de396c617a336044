"""The demo: Fernhill Broadcasting's generated lake, the catalogue run over it, and its summary."""

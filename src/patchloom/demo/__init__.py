"""The made-up demo archive and the demo recipe."""

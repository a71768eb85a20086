"""Recipes: the validated settings of a run (schema), hardened YAML loading, and error messages."""

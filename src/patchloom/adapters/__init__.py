"""Adapters that plug patchloom into other frameworks' data loaders."""

"""The `patchloom` command: one module per command group; the entry point is `patchloom.cli.main:main`."""

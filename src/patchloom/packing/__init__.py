"""Packing: rows assigned to images, the streaming Packer, and the PackedBatch it writes."""

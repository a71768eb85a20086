"""Packing: rows assigned to images, the streaming Packer, and the PackedBatch it writes.

assign.py  ALGORITHMS (packing algorithm name -> function) and assign_rows, by token counts alone
packer.py  build_batch, the streaming Packer (with its resume state) and the stateless pack()
batch.py   PackedBatch and what kernels and losses derive from it (masks, cu_seqlens, pooling)
"""

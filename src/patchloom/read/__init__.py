"""Reading: shard specs, the epoch order and rank/worker split, tar records, cursor and shuffle buffer."""

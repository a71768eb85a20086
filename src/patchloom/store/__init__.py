"""Pre-packed shards: format, writer, reader, verify, and the local and Ray engines."""

"""The command line: analyze, serve, keys and archive (the bioparity command)."""

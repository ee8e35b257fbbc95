"""On the wire and in files: topics, JSON fields, SenML, codecs, stream files, CSV, TOML."""

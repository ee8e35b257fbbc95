"""Durable state: the journal, checkpoints, the state store, model files, records."""

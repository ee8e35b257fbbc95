"""The engine: pairing, guards and the learning of every sensor; turning a config into parts."""

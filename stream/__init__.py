"""shiftsieve.stream: I/O around the models: sources, decoding, replay, CLI."""

"""Live reconstruction: the link from the sequencer to the worker processes, local or remote."""

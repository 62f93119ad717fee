"""Driving the bench: the devices, the run sequencer, the session around a run, and its finish and recovery."""

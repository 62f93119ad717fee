"""Driving the bench: the devices, the run sequencer, the session around a run, its finish and recovery, alignment and the bench-calibration measurements."""

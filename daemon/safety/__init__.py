"""The laser safety box, its readings, and the dose limits the planner and the sequencer respect."""

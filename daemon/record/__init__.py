"""What a run leaves behind: the run file (store, runfile, runlog, nexus), the run state and the frame streams."""

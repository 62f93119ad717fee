"""What a run leaves behind: the run file (layout, writer, reader, text log, NeXus), the per-frame checks whose flags it stores, the run state and the frame streams."""

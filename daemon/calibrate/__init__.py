"""Camera and bench calibration without devices: photon transfer, camera profiles, the precision budget (the planner)."""

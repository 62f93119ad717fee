"""Camera and bench calibration: photon transfer, camera profiles, dose and precision budgets."""

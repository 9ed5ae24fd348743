"""The workflow's per-item jobs, batches, sample and calibration sheets, the config check."""

//! Calibration statistics.

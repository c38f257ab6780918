//! Theil-Sen and Mann-Kendall (being written).

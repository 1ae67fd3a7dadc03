//! Cohort report (in progress).

"""Data preparation: reading tables, validation, time re-anchoring, inclusion rules, the covariate transform and its groups, the Panel arrays, the demo cohort."""

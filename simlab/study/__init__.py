"""Study files and data files in; a validated, frozen `Study` out (and back to TOML)."""

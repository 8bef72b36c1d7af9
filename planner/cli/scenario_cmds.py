"""`pledge validate`: check a scenario folder against the data contract."""

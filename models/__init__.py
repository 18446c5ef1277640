"""The model catalog: one declarative TOML file per named special case."""

"""Library-level tests of the bundle: export, format, integrity, scoring."""

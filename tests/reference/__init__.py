"""Published reference values used by the reference tests, each module citing its source."""

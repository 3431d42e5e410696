"""stats subpackage."""

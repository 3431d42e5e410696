"""fit subpackage."""

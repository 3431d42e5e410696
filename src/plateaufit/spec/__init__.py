"""spec subpackage."""

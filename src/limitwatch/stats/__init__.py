"""Pure statistics: no I/O, no clock. Everything here is usable from a notebook or a test."""

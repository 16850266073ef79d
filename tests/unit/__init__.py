"""Unit tests: one function or module at a time, on small arrays or tiny studies."""

"""Bundled examples used by the README's first command and by the tests."""

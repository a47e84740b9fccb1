"""Inverse design of electron-coupled nanophotonic samples: what a designer works with."""

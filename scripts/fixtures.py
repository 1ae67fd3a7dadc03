"""Fixture makers: each `make_<name>(out_dir)` writes deterministic files into out_dir."""

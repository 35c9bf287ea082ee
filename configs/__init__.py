"""Example sweep files (``*.toml``), shipped as package data: ``capsweep examples`` lists and copies them."""

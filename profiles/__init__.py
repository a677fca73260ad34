"""Built-in profiles, data only: species/, lasers/, generators/, scenarios/ (TOML).

This file only makes the folder an importable package so that the profiles ship
inside the wheel and are found with importlib.resources."""

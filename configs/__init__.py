"""Shipped configuration files (TOML), installed as package data of ``wingwatch.configs``."""

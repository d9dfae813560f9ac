"""Errors of the configuration, shared by the settings and the region files they name."""

from __future__ import annotations


class ConfigError(Exception):
    """A configuration file is missing or invalid; the message names the file and the key."""

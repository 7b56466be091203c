"""Sequence files shipped with pycnoctl; the YAML files beside this module are package data."""

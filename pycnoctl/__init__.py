"""pycnoctl: instrument-control daemon for home-built gas pycnometers.

The code lives in the top-level folders controller/, drivers/, sim/ and sequences/; this package
links them under one import name, so an editable install is a plain path entry that type checkers
and import-contract tools can follow.
"""

__version__ = "0.1.0"

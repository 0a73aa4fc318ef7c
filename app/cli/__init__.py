"""The command line of Modescope: one module per verb, shared pieces in :mod:`.common`."""

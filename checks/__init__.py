"""The standard check catalogue (installed as ``toolkit.catalogue``); copy a file to start a check."""

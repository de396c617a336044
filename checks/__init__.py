"""The standard check catalogue (installed as ``toolkit.checks``); copy a file to start a check."""

"""listenpost command line, venue simulator and demo."""

"""listenpost edge agent: scan, decode, filter, calibrate, spool and upload BLE readings."""

__version__ = "0.1.0"

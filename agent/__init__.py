"""listenpost edge agent: scan, decode, filter, calibrate, spool and upload BLE readings."""

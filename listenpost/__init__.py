"""listenpost: run a fleet of BLE receivers (edge agent, collector, simulator, demo)."""

__version__ = "0.2.0"

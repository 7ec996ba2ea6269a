"""The one collector client: uplink, heartbeat, remote config, enrollment, HTTP session."""

"""What agent and collector share: records, wire protocol, identities, time, settings, errors, logs."""

"""The daemon on the message bus: request schema, dispatch, leases, jobs, telemetry, sockets."""

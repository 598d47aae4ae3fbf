"""The terminal dashboard: panels as pure functions of the telemetry record, the textual app, and
where its telemetry comes from (the runtime's socket, MQTT, a recording).
"""

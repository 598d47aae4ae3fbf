"""The real-time loop: the tick and its task group, the host clock, the estimator, the operator
and telemetry socket, and the host check. I/O lives here and in drivers/.
"""

"""Work in simulated time: the dry run, the Monte Carlo sweep, the design verdict that asks the
simulated rig, and the go / no-go preflight.
"""

"""The method: what set-theoretic MRAC computes, as plain functions on numpy arrays.

Barrier families, regressor bases (named terms and radial bases), the adaptive law and its
modifiers, time-varying bounds, command profiles, the design (LQR baseline, tracking gain,
Lyapunov matrix, eps from limits, the sampled-data closed form) and the simulated rig a config
names. Pure and batched: no clocks, no I/O, no asyncio, serial, MQTT or screen
(tests/test_layering.py).
"""

"""The watchdog's rules, the supervisor's modes and the fallbacks: pure decisions, evaluated by
the live loop and (the rules) by the sweep alike. No clocks and no I/O here.
"""

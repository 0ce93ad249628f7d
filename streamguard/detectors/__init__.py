"""Detectors: each module holds one published method's parameters, state arrays and compiled kernel.

Every detector reads the same standardized points, z = (mean - mu0) / (sigma0 / sqrt(n)), decides per
point whether it signals (a rule code, 0 for in control), and hands that verdict with its statistic
and limit to ``alarms.alarm_step`` inside the same loop. Only alarm transitions leave the kernel; a
per-point trace is written only when asked for (tests, pictures).
"""

"""A plant simulator: sensor data from machine physics, with scripted modes and faults.

The invented plant is the Fernbrook water treatment works. Everything here is pure
(values in, values out) except `publish.py` (MQTT) and `cli.py`; the scenario and
labels files are read and written through small helpers in `scenario.py`.
"""

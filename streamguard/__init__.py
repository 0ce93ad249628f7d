"""streamguard: streaming change detection for sensor historians and MQTT.

Samples flow one way: source -> decode -> quality gate -> subgroups -> detectors -> alarm state -> sinks.
The same Pipeline object serves the live service and the replay of historian files.
"""

__version__ = "0.1.0"

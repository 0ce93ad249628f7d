"""Where samples come from: historian files for replay and baseline, and the live MQTT subscription."""

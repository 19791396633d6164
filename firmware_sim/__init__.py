"""The simulated sensor: Bloch physics, digital lock-in, scenarios and a frame emitter."""

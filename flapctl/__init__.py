"""flapctl: controller for cross-flow turbine rigs with actively flapped blades."""
__version__ = "0.1.0"

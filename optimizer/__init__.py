"""tierplan: choose tiered task-space controller plans for arms with mixed-bandwidth actuators."""

__version__ = "0.1.0"

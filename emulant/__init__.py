"""emulant: emulate a target trial from registry-style extracts."""

__version__ = "0.1.0"

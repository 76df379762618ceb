"""envelope: where a species' climate will suit it, and which of those places it can reach."""

__version__ = "0.1.0"

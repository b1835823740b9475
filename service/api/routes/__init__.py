"""One router per family of endpoints."""

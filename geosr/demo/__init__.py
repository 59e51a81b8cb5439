"""The demo scenario: an invented river valley, degraded, magnified and shown side by side."""

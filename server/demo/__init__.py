"""The demo pilot: an invented scenario (``scenario``), seeded through the real API (``seed``)."""

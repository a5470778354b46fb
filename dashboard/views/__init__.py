"""The board's views; each owns its layout and callbacks."""

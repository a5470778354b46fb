"""Simulated instruments that speak the real protocols (serial lines, Modbus) for the demo and tests."""

"""Simulated instruments speaking the real protocols (serial lines, Modbus), for demo and tests."""

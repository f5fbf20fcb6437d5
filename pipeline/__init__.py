"""Thermal Ledger: learn and audit thermostat setpoint policies from utility data."""

__version__ = "0.1.0"

"""Instrument layer: SCPI drivers over pyvisa, and the simulated bench. Imports nothing of benchkit or fits."""

"""Verification of a supplier's claimed C(V) curve against measured samples.

uncertainty (GUM combination), decision (ILAC-G8 rules, ISO 14253-1 zones), claims (the claim
file), aging (class-2 aging law), sampling (ISO 2859-1 plans), lot (lot statistics), report
(HTML + JSON), budget (effective capacitance at an operating point).
"""

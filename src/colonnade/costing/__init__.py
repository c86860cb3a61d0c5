"""The costing layer: costs as pure functions of shapes, latency, hardware profiles,
sizing and the ledger. Reads networks, never changes them.
"""

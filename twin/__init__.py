"""twin: a live digital twin of a steam power plant's water-steam cycle.

Advisory monitoring only: never used to trip, interlock or operate equipment.
"""

__version__ = "0.1.0"

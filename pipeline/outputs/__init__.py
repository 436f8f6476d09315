"""Everything a run writes into the output folder (each file written atomically)."""

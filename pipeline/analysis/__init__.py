"""Pure functions on a decoded piece: key, meter, statistics, shingles."""

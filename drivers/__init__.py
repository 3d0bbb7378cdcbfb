"""Generic SCPI instrument drivers and instrument profiles (benchseq.drivers)."""

"""Acquisition: sensor bytes or files -> blocks of unit samples in a ring.

`sources/` reads (one kind per module), `decoders/` turns stream bytes into
blocks, `block.py` is the block every source hands over, `ring.py` holds the
samples the spectral stage reads, `recording.py` is the WAV format.
"""

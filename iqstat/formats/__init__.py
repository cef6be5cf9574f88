"""Readers and writers of capture file formats (SigMF recordings and archives, raw IQ)."""

"""Manifest and BIDS discovery, events and input checks (`check`)."""

"""Conditioning of layer checks: input variants that expose mistakes friendly inputs hide (``stress``)."""

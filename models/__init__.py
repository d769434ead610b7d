"""Midstream's tagging models: features, the CRF adapter, incremental decoding, training."""

__all__: list[str] = []

"""The gRPC service that adapts Midstream's models to the network."""

__all__: list[str] = []

"""Client library and command line of Midstream."""

__all__: list[str] = []

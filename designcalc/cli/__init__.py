"""The command layer: parse options, call the library, render. No statistics here."""

__all__: list[str] = []

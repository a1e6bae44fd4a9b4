"""Gyrometer desktop app: a thin PySide6 + pyqtgraph front end over gyrometer.core."""

__all__: list[str] = []

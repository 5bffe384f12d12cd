from stackdr.cli._main import main

__all__ = ["main"]

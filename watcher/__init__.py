"""watcher: ice-crystal coarsening watch for frozen-dessert cold stores."""

__version__ = "0.1.0"
MODEL_VERSION = "lsw-pop-3"

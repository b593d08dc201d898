"""The invented Tolmere Basin network used by ``gapband demo`` (installed as gapband.demo)."""

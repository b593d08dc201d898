"""Model presets shipped with gapband (installed as gapband.presets)."""

"""The pack's scripts: one module each, declared in ``toolbox/manifest.toml``."""

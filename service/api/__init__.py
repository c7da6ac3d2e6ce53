"""HTTP layer: thin routes that parse, look up, delegate to the core, and answer."""

"""Model intake: the spec (TOML), loading it into a checked model, the bundled models, image
preprocessing, and the layer map (shapes, parameters, MACs, receptive fields)."""

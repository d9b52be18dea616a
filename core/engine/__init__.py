"""The measuring engine: text and chunks, noise, streaming metrics, the sweep, latent health."""

"""chunkscope engine: load chunk autoencoders, perturb their latents, score every token.

Imports no Qt; everything the workbench shows is computed here. The subpackages, by concern:

- `core.codecs`: the codec contract, the built-in checkpoint, its architecture, tokenizers
- `core.engine`: text, noise, streaming metrics, the sweep, latent health
- `core.analyses`: compare, training-run trend, token views, the live view's computations
- `core.outputs`: atomic files, the HTML report, the workspace
- `core.training`: the sample models' corpus and recipe (apart from the engine)

Importing `core` loads nothing but the version.
"""

__version__ = "0.1.0"

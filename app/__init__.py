"""chunkscope workbench: the Qt front end. Thin: every number comes from core."""

from app.compat import make_singletons_immortal

make_singletons_immortal()

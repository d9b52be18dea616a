"""chunkscope workbench: the Qt front end. Shows what core computed; never computes a metric."""

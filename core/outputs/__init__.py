"""What the tool writes: atomic files, the HTML report, the workspace."""

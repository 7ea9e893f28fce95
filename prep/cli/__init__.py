"""Command-line interface (``beatmill``). Heavy imports live inside the commands."""

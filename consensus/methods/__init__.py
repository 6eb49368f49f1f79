"""Pure numerical methods: take and return frames or arrays, no I/O."""

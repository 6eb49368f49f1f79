"""The monthly cycle: run, override, publish, export, explode."""

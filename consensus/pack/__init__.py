"""The meeting pack: context building, charts and rendering."""

"""Built-in stages and the algorithms they need. Each stage lives in its own module."""

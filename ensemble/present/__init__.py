"""What people read from a result: the text summary of ``ensemble summary``."""

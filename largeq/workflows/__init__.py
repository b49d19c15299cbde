"""workflows layer."""

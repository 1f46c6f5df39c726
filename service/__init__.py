"""leadline."""

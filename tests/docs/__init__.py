"""Scripts that make README's images, and what they share."""

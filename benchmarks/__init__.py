"""asv benchmark suite of galerkit (see README.md here)."""

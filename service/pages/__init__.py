"""Human status pages: ``GET /experiments`` and ``GET /experiments/{id}`` (HTML, no JS)."""

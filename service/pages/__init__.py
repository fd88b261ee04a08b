"""Human status pages: ``GET /experiments`` and ``GET /experiments/{id}`` (HTML; charts drawn
in the browser from the page's series, server-drawn SVG without JavaScript), their static files,
the series CSV, and the self-contained HTML report of ``inrush analyze --html``."""

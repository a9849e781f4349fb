"""whirlwatch web dashboard and JSON API (Flask application factory)."""

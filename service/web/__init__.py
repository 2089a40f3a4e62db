"""The dashboard: server-rendered pages (routes.router), signed sessions, SVG charts."""

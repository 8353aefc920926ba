"""Presentation: terminal screens, HTML/Markdown report, figures, palette."""

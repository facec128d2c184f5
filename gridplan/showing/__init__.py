"""The showing side: terminal text, figures and the HTML report."""

"""Report writers shared by the layers above: HTML page kit, rich renderables, the session report, safe text."""

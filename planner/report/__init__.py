"""The HTML report: its data (slices, maps, model checks), figures and page."""

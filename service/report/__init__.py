"""The human-readable side of a job: SVG plots and the HTML report."""

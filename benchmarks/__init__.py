"""Speed and quality measurements, as ratios against baselines measured in the same run."""

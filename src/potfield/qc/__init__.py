"""Quality control: spec profiles, checks, maps and the report."""

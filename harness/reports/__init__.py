"""What runs produce: timelines, and the generated tables of docs/."""

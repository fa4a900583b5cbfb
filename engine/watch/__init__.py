"""The unattended loop: schedule, observer, clock."""

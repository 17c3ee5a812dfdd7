"""Turns samples into phase and rail condition and events, using physics; decides transactions."""

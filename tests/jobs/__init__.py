"""The scheduled refresh and the leader lock."""

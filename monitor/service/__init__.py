"""The running service: the batch pipeline from a message to a commit and its publication."""

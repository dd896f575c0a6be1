"""What outlives a process: checkpoints (segments, identity, files) and tuning files.
"""

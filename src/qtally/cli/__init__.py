"""qtally.cli"""

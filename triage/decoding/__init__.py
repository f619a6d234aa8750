"""decoding"""

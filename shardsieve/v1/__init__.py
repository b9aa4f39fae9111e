"""Generated protobuf and gRPC modules for the shardsieve.v1 wire contract.

Do not edit the *_pb2*.py files: regenerate with `python -m shardsieve.protogen`.
"""

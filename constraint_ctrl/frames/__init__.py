"""Coordinate frames without middleware: a tf2-style transform buffer and message helpers."""
from .buffer import LookupFailure, Rejection, Transform, TransformBuffer
from .messages import EdgeSample, add_tf_message, edge_from_transform_stamped, stamp_to_ns

__all__ = ['EdgeSample', 'LookupFailure', 'Rejection', 'Transform', 'TransformBuffer',
           'add_tf_message', 'edge_from_transform_stamped', 'stamp_to_ns']

"""The Sparkplug B payload messages, built as protobuf descriptors in Python (no protoc step).

Why built here rather than generated: generated ``_pb2`` modules are tied to the protobuf
release that generated them (a newer runtime refuses older generated code, an older one refuses
newer), and a protoc step would make the build need a compiler. The schema is small and fixed by
the specification, so it is written out below, field for field, as a ``FileDescriptorProto`` in a
private descriptor pool; the ``protobuf`` runtime (pure Python or its C extension, whichever is
installed) makes the message classes from it. Nothing here is registered in protobuf's default
pool, so another package's copy of the same schema cannot clash with it.

The schema is proto2, as in the specification: ``Payload`` (timestamp 1, metrics 2, seq 3,
uuid 4, body 5) with nested ``Metric`` (name 1, alias 2, timestamp 3, datatype 4,
is_historical 5, is_transient 6, is_null 7, metadata 8, properties 9, and the value oneof:
int_value 10, long_value 11, float_value 12, double_value 13, boolean_value 14, string_value 15,
bytes_value 16, dataset_value 17, template_value 18, extension_value 19), ``DataSet``,
``Template``, ``PropertyValue``, ``PropertySet``, ``PropertySetList`` and ``MetaData``, with the
extension ranges the specification reserves.

>>> payload = Payload(timestamp=1_767_225_600_000, seq=3)
>>> metric = payload.metrics.add(name="boiler-1/steam-flow", alias=7, datatype=DATATYPES["Double"])
>>> metric.double_value = 12.5
>>> again = Payload.FromString(payload.SerializeToString())
>>> again.seq, again.metrics[0].alias, again.metrics[0].WhichOneof("value")
(3, 7, 'double_value')

References
----------
Eclipse Foundation, *Sparkplug 3.0.0 Specification* (2022), chapter 6 "Payloads", section 6.4
"Sparkplug B" and its protobuf schema (github.com/eclipse-sparkplug/sparkplug,
specification/src/main/asciidoc/chapters/Sparkplug_6_Payloads.adoc); Google, *Protocol Buffers
Language Guide (proto2)* and the Python API's ``descriptor_pb2`` and ``message_factory``.
"""

from __future__ import annotations

from typing import Any

from google.protobuf import descriptor_pb2, descriptor_pool, message_factory

__all__ = ["DATATYPES", "DATATYPE_NAMES", "PACKAGE", "Payload"]

PACKAGE = "org.eclipse.tahu.protobuf"
"""The specification's package name; the descriptors live in a private pool."""

DATATYPES: dict[str, int] = {
    name: number
    for number, name in enumerate(
        (
            "Unknown", "Int8", "Int16", "Int32", "Int64", "UInt8", "UInt16", "UInt32", "UInt64",
            "Float", "Double", "Boolean", "String", "DateTime", "Text", "UUID", "DataSet",
            "Bytes", "File", "Template", "PropertySet", "PropertySetList", "Int8Array",
            "Int16Array", "Int32Array", "Int64Array", "UInt8Array", "UInt16Array",
            "UInt32Array", "UInt64Array", "FloatArray", "DoubleArray", "BooleanArray",
            "StringArray", "DateTimeArray",
        )
    )
}
"""Sparkplug 3.0 section 6.4.16, "DataType Details": name -> number."""

DATATYPE_NAMES: dict[int, str] = {number: name for name, number in DATATYPES.items()}

_F = descriptor_pb2.FieldDescriptorProto
_KIND = {
    "string": _F.TYPE_STRING,
    "uint32": _F.TYPE_UINT32,
    "uint64": _F.TYPE_UINT64,
    "float": _F.TYPE_FLOAT,
    "double": _F.TYPE_DOUBLE,
    "bool": _F.TYPE_BOOL,
    "bytes": _F.TYPE_BYTES,
}
_MAX = 536_870_912  # one past the largest field number: "to max"


def _message(
    parent: Any,
    name: str,
    fields: list[tuple[str, int, str, str]],
    *,
    oneof: str | None = None,
    extensions_from: int | None = None,
) -> Any:
    """Add message ``name`` with ``(name, number, label, type)`` fields; a label of ``oneof``
    puts the field in the message's one ``oneof``; a type that is not a scalar names a
    message by its full name."""
    message = parent.add(name=name)
    if oneof is not None:
        message.oneof_decl.add(name=oneof)
    for field_name, number, label, kind in fields:
        field = message.field.add(name=field_name, number=number)
        field.label = _F.LABEL_REPEATED if label == "repeated" else _F.LABEL_OPTIONAL
        if label == "oneof":
            field.oneof_index = 0
        if kind in _KIND:
            field.type = _KIND[kind]
        else:
            field.type = _F.TYPE_MESSAGE
            field.type_name = f".{PACKAGE}.Payload.{kind}"
    if extensions_from is not None:
        message.extension_range.add(start=extensions_from, end=_MAX)
    return message


def _extension(parent: Any, name: str) -> None:
    _message(parent.nested_type, name, [], extensions_from=1)


def _file() -> descriptor_pb2.FileDescriptorProto:
    file = descriptor_pb2.FileDescriptorProto(
        name="limitwatch/sparkplug_b.proto", package=PACKAGE, syntax="proto2"
    )
    payload = _message(
        file.message_type,
        "Payload",
        [
            ("timestamp", 1, "optional", "uint64"),
            ("metrics", 2, "repeated", "Metric"),
            ("seq", 3, "optional", "uint64"),
            ("uuid", 4, "optional", "string"),
            ("body", 5, "optional", "bytes"),
        ],
        extensions_from=6,
    )
    nested = payload.nested_type

    template = _message(
        nested,
        "Template",
        [
            ("version", 1, "optional", "string"),
            ("metrics", 2, "repeated", "Metric"),
            ("parameters", 3, "repeated", "Template.Parameter"),
            ("template_ref", 4, "optional", "string"),
            ("is_definition", 5, "optional", "bool"),
        ],
        extensions_from=6,
    )
    parameter = _message(
        template.nested_type,
        "Parameter",
        [
            ("name", 1, "optional", "string"),
            ("type", 2, "optional", "uint32"),
            ("int_value", 3, "oneof", "uint32"),
            ("long_value", 4, "oneof", "uint64"),
            ("float_value", 5, "oneof", "float"),
            ("double_value", 6, "oneof", "double"),
            ("boolean_value", 7, "oneof", "bool"),
            ("string_value", 8, "oneof", "string"),
            ("extension_value", 9, "oneof", "Template.Parameter.ParameterValueExtension"),
        ],
        oneof="value",
    )
    _extension(parameter, "ParameterValueExtension")

    dataset = _message(
        nested,
        "DataSet",
        [
            ("num_of_columns", 1, "optional", "uint64"),
            ("columns", 2, "repeated", "string"),
            ("types", 3, "repeated", "uint32"),
            ("rows", 4, "repeated", "DataSet.Row"),
        ],
        extensions_from=5,
    )
    value = _message(
        dataset.nested_type,
        "DataSetValue",
        [
            ("int_value", 1, "oneof", "uint32"),
            ("long_value", 2, "oneof", "uint64"),
            ("float_value", 3, "oneof", "float"),
            ("double_value", 4, "oneof", "double"),
            ("boolean_value", 5, "oneof", "bool"),
            ("string_value", 6, "oneof", "string"),
            ("extension_value", 7, "oneof", "DataSet.DataSetValue.DataSetValueExtension"),
        ],
        oneof="value",
    )
    _extension(value, "DataSetValueExtension")
    _message(
        dataset.nested_type,
        "Row",
        [("elements", 1, "repeated", "DataSet.DataSetValue")],
        extensions_from=2,
    )

    property_value = _message(
        nested,
        "PropertyValue",
        [
            ("type", 1, "optional", "uint32"),
            ("is_null", 2, "optional", "bool"),
            ("int_value", 3, "oneof", "uint32"),
            ("long_value", 4, "oneof", "uint64"),
            ("float_value", 5, "oneof", "float"),
            ("double_value", 6, "oneof", "double"),
            ("boolean_value", 7, "oneof", "bool"),
            ("string_value", 8, "oneof", "string"),
            ("propertyset_value", 9, "oneof", "PropertySet"),
            ("propertysets_value", 10, "oneof", "PropertySetList"),
            ("extension_value", 11, "oneof", "PropertyValue.PropertyValueExtension"),
        ],
        oneof="value",
    )
    _extension(property_value, "PropertyValueExtension")
    _message(
        nested,
        "PropertySet",
        [("keys", 1, "repeated", "string"), ("values", 2, "repeated", "PropertyValue")],
        extensions_from=3,
    )
    _message(
        nested, "PropertySetList", [("propertyset", 1, "repeated", "PropertySet")],
        extensions_from=2,
    )  # fmt: skip
    _message(
        nested,
        "MetaData",
        [
            ("is_multi_part", 1, "optional", "bool"),
            ("content_type", 2, "optional", "string"),
            ("size", 3, "optional", "uint64"),
            ("seq", 4, "optional", "uint64"),
            ("file_name", 5, "optional", "string"),
            ("file_type", 6, "optional", "string"),
            ("md5", 7, "optional", "string"),
            ("description", 8, "optional", "string"),
        ],
        extensions_from=9,
    )
    metric = _message(
        nested,
        "Metric",
        [
            ("name", 1, "optional", "string"),
            ("alias", 2, "optional", "uint64"),
            ("timestamp", 3, "optional", "uint64"),
            ("datatype", 4, "optional", "uint32"),
            ("is_historical", 5, "optional", "bool"),
            ("is_transient", 6, "optional", "bool"),
            ("is_null", 7, "optional", "bool"),
            ("metadata", 8, "optional", "MetaData"),
            ("properties", 9, "optional", "PropertySet"),
            ("int_value", 10, "oneof", "uint32"),
            ("long_value", 11, "oneof", "uint64"),
            ("float_value", 12, "oneof", "float"),
            ("double_value", 13, "oneof", "double"),
            ("boolean_value", 14, "oneof", "bool"),
            ("string_value", 15, "oneof", "string"),
            ("bytes_value", 16, "oneof", "bytes"),
            ("dataset_value", 17, "oneof", "DataSet"),
            ("template_value", 18, "oneof", "Template"),
            ("extension_value", 19, "oneof", "Metric.MetricValueExtension"),
        ],
        oneof="value",
    )
    _extension(metric, "MetricValueExtension")
    return file


_POOL = descriptor_pool.DescriptorPool()
_POOL.Add(_file())

Payload: Any = message_factory.GetMessageClass(_POOL.FindMessageTypeByName(f"{PACKAGE}.Payload"))
"""The Sparkplug B payload message class (``Payload.FromString(data)`` decodes)."""

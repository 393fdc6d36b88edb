"""The Sparkplug B 3.0 protobuf schema as a serialised ``FileDescriptorProto`` (generated).

Generated, not written: do not edit. Source: ``sparkplug_b/sparkplug_b.proto`` of the
Eclipse Tahu repository (the schema of the Eclipse Sparkplug 3.0 specification),
Copyright (c) 2015, 2018 Cirrus Link Solutions and others, licensed under the Eclipse
Public License 2.0 (SPDX-License-Identifier: EPL-2.0, https://www.eclipse.org/legal/epl-2.0).
Schema file SHA-256: 4432c5c483b7fb9732d0594c98a2e97dca5e517e39c5374a8b918d837f0b4a19.

How it was generated (grpcio-tools' protoc at development time only; not a dependency)::

    python3 -m grpc_tools.protoc -I. --descriptor_set_out=spb.desc sparkplug_b.proto
    python3 -c "from google.protobuf import descriptor_pb2 as d; \\
        f = d.FileDescriptorSet.FromString(open('spb.desc', 'rb').read()).file[0]; \\
        print(repr(f.SerializeToString(deterministic=True)))"

Only :mod:`twin.sparkplug` reads it: it loads the descriptor into a private
``DescriptorPool`` at import, which works with any protobuf runtime of the pinned
range (no generated-code version check, unlike a protoc ``_pb2`` module).
"""

SERIALIZED = (
    b'\n\x11sparkplug_b.proto\x12\x19org.eclipse.tahu.protobuf"\x87\x1c\n\x07Payload\x12\x1c'
    b'\n\ttimestamp\x18\x01 \x01(\x04R\ttimestamp\x12C\n\x07metrics\x18\x02 \x03(\x0b2).org.eclipse.'
    b'tahu.protobuf.Payload.MetricR\x07metrics\x12\x10\n\x03seq\x18\x03 \x01(\x04R\x03seq\x12\x12\n\x04u'
    b'uid\x18\x04 \x01(\tR\x04uuid\x12\x12\n\x04body\x18\x05 \x01(\x0cR\x04body\x1a\xc4\x05\n\x08Template\x12\x18\n\x07version\x18'
    b'\x01 \x01(\tR\x07version\x12C\n\x07metrics\x18\x02 \x03(\x0b2).org.eclipse.tahu.protobuf.'
    b'Payload.MetricR\x07metrics\x12U\n\nparameters\x18\x03 \x03(\x0b25.org.eclipse.ta'
    b'hu.protobuf.Payload.Template.ParameterR\nparameters\x12!\n\x0ctempla'
    b'te_ref\x18\x04 \x01(\tR\x0btemplateRef\x12#\n\ris_definition\x18\x05 \x01(\x08R\x0cisDefiniti'
    b'on\x1a\xaf\x03\n\tParameter\x12\x12\n\x04name\x18\x01 \x01(\tR\x04name\x12\x12\n\x04type\x18\x02 \x01(\rR\x04type\x12\x1d\n\t'
    b'int_value\x18\x03 \x01(\rH\x00R\x08intValue\x12\x1f\n\nlong_value\x18\x04 \x01(\x04H\x00R\tlongValue'
    b'\x12!\n\x0bfloat_value\x18\x05 \x01(\x02H\x00R\nfloatValue\x12#\n\x0cdouble_value\x18\x06 \x01(\x01H\x00R'
    b'\x0bdoubleValue\x12%\n\rboolean_value\x18\x07 \x01(\x08H\x00R\x0cbooleanValue\x12#\n\x0cstrin'
    b'g_value\x18\x08 \x01(\tH\x00R\x0bstringValue\x12x\n\x0fextension_value\x18\t \x01(\x0b2M.org.'
    b'eclipse.tahu.protobuf.Payload.Template.Parameter.ParameterVa'
    b'lueExtensionH\x00R\x0eextensionValue\x1a#\n\x17ParameterValueExtension*\x08\x08'
    b'\x01\x10\x80\x80\x80\x80\x02B\x07\n\x05value*\x08\x08\x06\x10\x80\x80\x80\x80\x02\x1a\x9e\x05\n\x07DataSet\x12$\n\x0enum_of_columns\x18\x01 \x01'
    b'(\x04R\x0cnumOfColumns\x12\x18\n\x07columns\x18\x02 \x03(\tR\x07columns\x12\x14\n\x05types\x18\x03 \x03(\rR\x05t'
    b'ypes\x12B\n\x04rows\x18\x04 \x03(\x0b2..org.eclipse.tahu.protobuf.Payload.DataS'
    b'et.RowR\x04rows\x1a\x88\x03\n\x0cDataSetValue\x12\x1d\n\tint_value\x18\x01 \x01(\rH\x00R\x08intValue'
    b'\x12\x1f\n\nlong_value\x18\x02 \x01(\x04H\x00R\tlongValue\x12!\n\x0bfloat_value\x18\x03 \x01(\x02H\x00R\nfl'
    b'oatValue\x12#\n\x0cdouble_value\x18\x04 \x01(\x01H\x00R\x0bdoubleValue\x12%\n\rboolean_val'
    b'ue\x18\x05 \x01(\x08H\x00R\x0cbooleanValue\x12#\n\x0cstring_value\x18\x06 \x01(\tH\x00R\x0bstringValu'
    b'e\x12x\n\x0fextension_value\x18\x07 \x01(\x0b2M.org.eclipse.tahu.protobuf.Paylo'
    b'ad.DataSet.DataSetValue.DataSetValueExtensionH\x00R\x0eextensionVa'
    b'lue\x1a!\n\x15DataSetValueExtension*\x08\x08\x01\x10\x80\x80\x80\x80\x02B\x07\n\x05value\x1ad\n\x03Row\x12S\n\x08el'
    b'ements\x18\x01 \x03(\x0b27.org.eclipse.tahu.protobuf.Payload.DataSet.Dat'
    b'aSetValueR\x08elements*\x08\x08\x02\x10\x80\x80\x80\x80\x02*\x08\x08\x05\x10\x80\x80\x80\x80\x02\x1a\xf5\x04\n\rPropertyValue\x12\x12\n'
    b'\x04type\x18\x01 \x01(\rR\x04type\x12\x17\n\x07is_null\x18\x02 \x01(\x08R\x06isNull\x12\x1d\n\tint_value\x18\x03 \x01('
    b'\rH\x00R\x08intValue\x12\x1f\n\nlong_value\x18\x04 \x01(\x04H\x00R\tlongValue\x12!\n\x0bfloat_valu'
    b'e\x18\x05 \x01(\x02H\x00R\nfloatValue\x12#\n\x0cdouble_value\x18\x06 \x01(\x01H\x00R\x0bdoubleValue\x12%'
    b'\n\rboolean_value\x18\x07 \x01(\x08H\x00R\x0cbooleanValue\x12#\n\x0cstring_value\x18\x08 \x01(\tH'
    b'\x00R\x0bstringValue\x12]\n\x11propertyset_value\x18\t \x01(\x0b2..org.eclipse.tahu'
    b'.protobuf.Payload.PropertySetH\x00R\x10propertysetValue\x12c\n\x12propert'
    b'ysets_value\x18\n \x01(\x0b22.org.eclipse.tahu.protobuf.Payload.Proper'
    b'tySetListH\x00R\x11propertysetsValue\x12r\n\x0fextension_value\x18\x0b \x01(\x0b2G.or'
    b'g.eclipse.tahu.protobuf.Payload.PropertyValue.PropertyValueE'
    b'xtensionH\x00R\x0eextensionValue\x1a"\n\x16PropertyValueExtension*\x08\x08\x01\x10\x80\x80\x80'
    b'\x80\x02B\x07\n\x05value\x1au\n\x0bPropertySet\x12\x12\n\x04keys\x18\x01 \x03(\tR\x04keys\x12H\n\x06values\x18\x02 \x03'
    b'(\x0b20.org.eclipse.tahu.protobuf.Payload.PropertyValueR\x06values'
    b'*\x08\x08\x03\x10\x80\x80\x80\x80\x02\x1am\n\x0fPropertySetList\x12P\n\x0bpropertyset\x18\x01 \x03(\x0b2..org.ecl'
    b'ipse.tahu.protobuf.Payload.PropertySetR\x0bpropertyset*\x08\x08\x02\x10\x80\x80\x80\x80'
    b'\x02\x1a\xef\x01\n\x08MetaData\x12"\n\ris_multi_part\x18\x01 \x01(\x08R\x0bisMultiPart\x12!\n\x0cconten'
    b't_type\x18\x02 \x01(\tR\x0bcontentType\x12\x12\n\x04size\x18\x03 \x01(\x04R\x04size\x12\x10\n\x03seq\x18\x04 \x01(\x04R\x03'
    b'seq\x12\x1b\n\tfile_name\x18\x05 \x01(\tR\x08fileName\x12\x1b\n\tfile_type\x18\x06 \x01(\tR\x08fileTyp'
    b'e\x12\x10\n\x03md5\x18\x07 \x01(\tR\x03md5\x12 \n\x0bdescription\x18\x08 \x01(\tR\x0bdescription*\x08\x08\t\x10\x80\x80'
    b'\x80\x80\x02\x1a\x9c\x07\n\x06Metric\x12\x12\n\x04name\x18\x01 \x01(\tR\x04name\x12\x14\n\x05alias\x18\x02 \x01(\x04R\x05alias\x12\x1c\n\t'
    b'timestamp\x18\x03 \x01(\x04R\ttimestamp\x12\x1a\n\x08datatype\x18\x04 \x01(\rR\x08datatype\x12#\n\ris'
    b'_historical\x18\x05 \x01(\x08R\x0cisHistorical\x12!\n\x0cis_transient\x18\x06 \x01(\x08R\x0bisTra'
    b'nsient\x12\x17\n\x07is_null\x18\x07 \x01(\x08R\x06isNull\x12G\n\x08metadata\x18\x08 \x01(\x0b2+.org.ecli'
    b'pse.tahu.protobuf.Payload.MetaDataR\x08metadata\x12N\n\nproperties\x18\t'
    b' \x01(\x0b2..org.eclipse.tahu.protobuf.Payload.PropertySetR\nproper'
    b'ties\x12\x1d\n\tint_value\x18\n \x01(\rH\x00R\x08intValue\x12\x1f\n\nlong_value\x18\x0b \x01(\x04H\x00R\tl'
    b'ongValue\x12!\n\x0bfloat_value\x18\x0c \x01(\x02H\x00R\nfloatValue\x12#\n\x0cdouble_value\x18'
    b'\r \x01(\x01H\x00R\x0bdoubleValue\x12%\n\rboolean_value\x18\x0e \x01(\x08H\x00R\x0cbooleanValue\x12'
    b'#\n\x0cstring_value\x18\x0f \x01(\tH\x00R\x0bstringValue\x12!\n\x0bbytes_value\x18\x10 \x01(\x0cH\x00R'
    b'\nbytesValue\x12Q\n\rdataset_value\x18\x11 \x01(\x0b2*.org.eclipse.tahu.protob'
    b'uf.Payload.DataSetH\x00R\x0cdatasetValue\x12T\n\x0etemplate_value\x18\x12 \x01(\x0b2+'
    b'.org.eclipse.tahu.protobuf.Payload.TemplateH\x00R\rtemplateValue'
    b'\x12i\n\x0fextension_value\x18\x13 \x01(\x0b2>.org.eclipse.tahu.protobuf.Payloa'
    b'd.Metric.MetricValueExtensionH\x00R\x0eextensionValue\x1a \n\x14MetricVal'
    b'ueExtension*\x08\x08\x01\x10\x80\x80\x80\x80\x02B\x07\n\x05value*\x08\x08\x06\x10\x80\x80\x80\x80\x02*\xf2\x03\n\x08DataType\x12\x0b\n\x07Unk'
    b'nown\x10\x00\x12\x08\n\x04Int8\x10\x01\x12\t\n\x05Int16\x10\x02\x12\t\n\x05Int32\x10\x03\x12\t\n\x05Int64\x10\x04\x12\t\n\x05UInt8\x10\x05'
    b'\x12\n\n\x06UInt16\x10\x06\x12\n\n\x06UInt32\x10\x07\x12\n\n\x06UInt64\x10\x08\x12\t\n\x05Float\x10\t\x12\n\n\x06Double\x10\n\x12'
    b'\x0b\n\x07Boolean\x10\x0b\x12\n\n\x06String\x10\x0c\x12\x0c\n\x08DateTime\x10\r\x12\x08\n\x04Text\x10\x0e\x12\x08\n\x04UUID\x10\x0f\x12\x0b'
    b'\n\x07DataSet\x10\x10\x12\t\n\x05Bytes\x10\x11\x12\x08\n\x04File\x10\x12\x12\x0c\n\x08Template\x10\x13\x12\x0f\n\x0bPropertySe'
    b't\x10\x14\x12\x13\n\x0fPropertySetList\x10\x15\x12\r\n\tInt8Array\x10\x16\x12\x0e\n\nInt16Array\x10\x17\x12\x0e\n\nI'
    b'nt32Array\x10\x18\x12\x0e\n\nInt64Array\x10\x19\x12\x0e\n\nUInt8Array\x10\x1a\x12\x0f\n\x0bUInt16Array\x10\x1b'
    b'\x12\x0f\n\x0bUInt32Array\x10\x1c\x12\x0f\n\x0bUInt64Array\x10\x1d\x12\x0e\n\nFloatArray\x10\x1e\x12\x0f\n\x0bDouble'
    b'Array\x10\x1f\x12\x10\n\x0cBooleanArray\x10 \x12\x0f\n\x0bStringArray\x10!\x12\x11\n\rDateTimeArray\x10'
    b'"B,\n\x19org.eclipse.tahu.protobufB\x0fSparkplugBProto'
)

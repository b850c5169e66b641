package export

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
)

// PLYData is the content of a PLY file as read by ReadPLY.
type PLYData struct {
	Format   string   // "ascii", "binary_little_endian" or "binary_big_endian"
	Version  string   // always "1.0"
	Comments []string // text of the comment lines, in order
	ObjInfo  []string // text of the obj_info lines, in order
	Elements []PLYElement
}

// PLYElement is one element ("vertex", "face", "edge", …) with its items.
type PLYElement struct {
	Name       string
	Count      int
	Properties []PLYProperty
}

// PLYProperty is one property of an element with its values for every
// item. Every PLY scalar type fits a float64 exactly, so values are stored
// as float64 whatever the type in the file.
type PLYProperty struct {
	Name string
	Type string // value type as written in the header, e.g. "float", "uchar", "int32"
	// CountType is the list count type for a list property, "" for a
	// scalar property.
	CountType string
	Scalar    []float64   // scalar property: one value per item (Count values)
	List      [][]float64 // list property: one list per item (Count lists)
}

// IsList reports whether p is a list property.
func (p *PLYProperty) IsList() bool { return p.CountType != "" }

// Element returns the element with the given name, or nil.
func (d *PLYData) Element(name string) *PLYElement {
	for i := range d.Elements {
		if d.Elements[i].Name == name {
			return &d.Elements[i]
		}
	}
	return nil
}

// Property returns the property with the given name, or nil.
func (e *PLYElement) Property(name string) *PLYProperty {
	for i := range e.Properties {
		if e.Properties[i].Name == name {
			return &e.Properties[i]
		}
	}
	return nil
}

// Limits of ReadPLY. They bound what a damaged header can make the reader
// do; real files stay far below them.
const (
	plyMaxHeaderLine  = 64 << 10 // bytes in one header line
	plyMaxHeaderBytes = 1 << 20  // bytes in the whole header
	plyMaxCount       = math.MaxInt32
	plyPrealloc       = 4096 // items allocated before any is read
)

// plyType describes a scalar type of the PLY format.
type plyType struct {
	size  int
	kind  byte // 'i' signed, 'u' unsigned, 'f' float
	bits  int
	canon string
}

// lookupPLYType accepts the type names of Turk's description (char uchar
// short ushort int uint float double) and the sized names common practice
// added (int8 uint8 int16 uint16 int32 uint32 float32 float64).
func lookupPLYType(name string) (plyType, bool) {
	switch name {
	case "char", "int8":
		return plyType{1, 'i', 8, "int8"}, true
	case "uchar", "uint8":
		return plyType{1, 'u', 8, "uint8"}, true
	case "short", "int16":
		return plyType{2, 'i', 16, "int16"}, true
	case "ushort", "uint16":
		return plyType{2, 'u', 16, "uint16"}, true
	case "int", "int32":
		return plyType{4, 'i', 32, "int32"}, true
	case "uint", "uint32":
		return plyType{4, 'u', 32, "uint32"}, true
	case "float", "float32":
		return plyType{4, 'f', 32, "float32"}, true
	case "double", "float64":
		return plyType{8, 'f', 64, "float64"}, true
	}
	return plyType{}, false
}

type propSpec struct {
	count plyType // list count type; size 0 for scalars
	value plyType
}

// ReadPLY reads a PLY file (format ascii, binary_little_endian or
// binary_big_endian, version 1.0) with any elements and any scalar or list
// properties. It checks every header line, every count and bound and that
// nothing follows the last element (trailing blank lines are allowed in
// ascii files). Errors name the header line or the element item at fault;
// damaged input never makes it panic or allocate more than the input
// justifies.
func ReadPLY(r io.Reader) (*PLYData, error) {
	br := bufio.NewReaderSize(r, plyMaxHeaderLine)
	d := &PLYData{}
	specs, err := readPLYHeader(br, d)
	if err != nil {
		return nil, err
	}
	switch d.Format {
	case "ascii":
		err = readPLYASCII(br, d, specs)
	case "binary_little_endian":
		err = readPLYBinary(br, d, specs, binary.LittleEndian)
	default:
		err = readPLYBinary(br, d, specs, binary.BigEndian)
	}
	if err != nil {
		return nil, err
	}
	return d, nil
}

func plyErr(format string, args ...any) error {
	return fmt.Errorf("export: PLY "+format, args...)
}

func readPLYHeader(br *bufio.Reader, d *PLYData) ([][]propSpec, error) {
	var specs [][]propSpec
	total := 0
	for lineNo := 1; ; lineNo++ {
		raw, err := br.ReadSlice('\n')
		if err == bufio.ErrBufferFull {
			return nil, plyErr("header line %d is longer than %d bytes; the file is not a PLY file or is damaged", lineNo, plyMaxHeaderLine)
		}
		if err != nil {
			if err == io.EOF && lineNo == 1 {
				return nil, plyErr(`file does not start with the line "ply"; it is not a PLY file`)
			}
			if err == io.EOF {
				return nil, plyErr("header ends at line %d without end_header; the file is truncated or not a PLY file", lineNo)
			}
			return nil, plyErr("reading header: %w", err)
		}
		total += len(raw)
		if total > plyMaxHeaderBytes {
			return nil, plyErr("header is longer than %d bytes; the file is damaged", plyMaxHeaderBytes)
		}
		line := strings.TrimSuffix(strings.TrimSuffix(string(raw), "\n"), "\r")
		if lineNo == 1 {
			if line != "ply" {
				return nil, plyErr(`file does not start with the line "ply"; it is not a PLY file`)
			}
			continue
		}
		f := strings.Fields(line)
		if len(f) == 0 {
			return nil, plyErr("header line %d is empty; remove it", lineNo)
		}
		switch f[0] {
		case "comment", "obj_info":
			text := strings.TrimPrefix(strings.TrimPrefix(strings.TrimLeft(line, " \t"), f[0]), " ")
			if f[0] == "comment" {
				d.Comments = append(d.Comments, text)
			} else {
				d.ObjInfo = append(d.ObjInfo, text)
			}
		case "format":
			if d.Format != "" {
				return nil, plyErr("header line %d: second format line; keep one", lineNo)
			}
			if len(f) != 3 {
				return nil, plyErr("header line %d: want \"format <ascii|binary_little_endian|binary_big_endian> 1.0\", got %q", lineNo, line)
			}
			switch f[1] {
			case "ascii", "binary_little_endian", "binary_big_endian":
			default:
				return nil, plyErr("header line %d: unknown format %q; use ascii, binary_little_endian or binary_big_endian", lineNo, f[1])
			}
			if f[2] != "1.0" {
				return nil, plyErr("header line %d: version %q is not supported; only 1.0 is defined", lineNo, f[2])
			}
			d.Format, d.Version = f[1], f[2]
		case "element":
			if d.Format == "" {
				return nil, plyErr("header line %d: element before the format line; put \"format …\" second", lineNo)
			}
			if len(f) != 3 {
				return nil, plyErr("header line %d: want \"element <name> <count>\", got %q", lineNo, line)
			}
			n, err := strconv.ParseInt(f[2], 10, 64)
			if err != nil || n < 0 || n > plyMaxCount {
				return nil, plyErr("header line %d: element %s count %q is not an integer in [0, %d]", lineNo, f[1], f[2], plyMaxCount)
			}
			if d.Element(f[1]) != nil {
				return nil, plyErr("header line %d: element %q declared twice; give each element one name", lineNo, f[1])
			}
			d.Elements = append(d.Elements, PLYElement{Name: f[1], Count: int(n)})
			specs = append(specs, nil)
		case "property":
			if len(d.Elements) == 0 {
				return nil, plyErr("header line %d: property before any element; declare the element first", lineNo)
			}
			e := &d.Elements[len(d.Elements)-1]
			var prop PLYProperty
			var spec propSpec
			if len(f) >= 2 && f[1] == "list" {
				if len(f) != 5 {
					return nil, plyErr("header line %d: want \"property list <count type> <value type> <name>\", got %q", lineNo, line)
				}
				ct, ok := lookupPLYType(f[2])
				if !ok || ct.kind == 'f' {
					return nil, plyErr("header line %d: list count type %q is not an integer type", lineNo, f[2])
				}
				vt, ok := lookupPLYType(f[3])
				if !ok {
					return nil, plyErr("header line %d: unknown type %q", lineNo, f[3])
				}
				prop = PLYProperty{Name: f[4], Type: f[3], CountType: f[2]}
				spec = propSpec{count: ct, value: vt}
			} else {
				if len(f) != 3 {
					return nil, plyErr("header line %d: want \"property <type> <name>\", got %q", lineNo, line)
				}
				vt, ok := lookupPLYType(f[1])
				if !ok {
					return nil, plyErr("header line %d: unknown type %q", lineNo, f[1])
				}
				prop = PLYProperty{Name: f[2], Type: f[1]}
				spec = propSpec{value: vt}
			}
			if e.Property(prop.Name) != nil {
				return nil, plyErr("header line %d: element %s has two properties named %q", lineNo, e.Name, prop.Name)
			}
			e.Properties = append(e.Properties, prop)
			specs[len(specs)-1] = append(specs[len(specs)-1], spec)
		case "end_header":
			if len(f) != 1 {
				return nil, plyErr("header line %d: text after end_header", lineNo)
			}
			if d.Format == "" {
				return nil, plyErr("header has no format line")
			}
			for i := range d.Elements {
				e := &d.Elements[i]
				pre := min(e.Count, plyPrealloc)
				for j := range e.Properties {
					if e.Properties[j].IsList() {
						e.Properties[j].List = make([][]float64, 0, pre)
					} else {
						e.Properties[j].Scalar = make([]float64, 0, pre)
					}
				}
			}
			return specs, nil
		default:
			return nil, plyErr("header line %d: unknown keyword %q", lineNo, f[0])
		}
	}
}

func readPLYBinary(br *bufio.Reader, d *PLYData, specs [][]propSpec, order binary.ByteOrder) error {
	var buf [8]byte
	read := func(t plyType) (float64, error) {
		b := buf[:t.size]
		if _, err := io.ReadFull(br, b); err != nil {
			return 0, err
		}
		switch t.canon {
		case "int8":
			return float64(int8(b[0])), nil
		case "uint8":
			return float64(b[0]), nil
		case "int16":
			return float64(int16(order.Uint16(b))), nil
		case "uint16":
			return float64(order.Uint16(b)), nil
		case "int32":
			return float64(int32(order.Uint32(b))), nil
		case "uint32":
			return float64(order.Uint32(b)), nil
		case "float32":
			return float64(math.Float32frombits(order.Uint32(b))), nil
		default:
			return math.Float64frombits(order.Uint64(b)), nil
		}
	}
	for ei := range d.Elements {
		e := &d.Elements[ei]
		if len(e.Properties) == 0 {
			continue // items without properties occupy no bytes
		}
		for item := 0; item < e.Count; item++ {
			for pi, sp := range specs[ei] {
				p := &e.Properties[pi]
				fail := func(err error) error {
					if errors.Is(err, io.EOF) || errors.Is(err, io.ErrUnexpectedEOF) {
						return plyErr("data ends in element %s item %d property %s; the file is truncated or its header counts are wrong", e.Name, item, p.Name)
					}
					return plyErr("reading element %s item %d: %w", e.Name, item, err)
				}
				if !p.IsList() {
					v, err := read(sp.value)
					if err != nil {
						return fail(err)
					}
					p.Scalar = append(p.Scalar, v)
					continue
				}
				c, err := read(sp.count)
				if err != nil {
					return fail(err)
				}
				if c < 0 {
					return plyErr("element %s item %d property %s has list length %v; lengths cannot be negative", e.Name, item, p.Name, c)
				}
				list := make([]float64, 0, min(int(c), plyPrealloc))
				for k := 0; k < int(c); k++ {
					v, err := read(sp.value)
					if err != nil {
						return fail(err)
					}
					list = append(list, v)
				}
				p.List = append(p.List, list)
			}
		}
	}
	if _, err := br.ReadByte(); err == nil {
		return plyErr("data continue after the last element; the header counts are wrong or the file is damaged")
	} else if err != io.EOF {
		return plyErr("reading data: %w", err)
	}
	return nil
}

func readPLYASCII(br *bufio.Reader, d *PLYData, specs [][]propSpec) error {
	lineNo := 0 // data line number, counted from the line after end_header
	nextLine := func() ([]string, error) {
		for {
			line, err := br.ReadString('\n')
			if line == "" && err != nil {
				return nil, err
			}
			lineNo++
			if f := strings.Fields(line); len(f) > 0 {
				return f, nil
			}
			if err != nil {
				return nil, err
			}
		}
	}
	for ei := range d.Elements {
		e := &d.Elements[ei]
		if len(e.Properties) == 0 {
			continue
		}
		for item := 0; item < e.Count; item++ {
			f, err := nextLine()
			if err == io.EOF {
				return plyErr("data end before element %s item %d; the file is truncated or its header counts are wrong", e.Name, item)
			} else if err != nil {
				return plyErr("reading data: %w", err)
			}
			at := 0
			take := func(t plyType, what string) (float64, error) {
				if at >= len(f) {
					return 0, plyErr("data line %d (element %s item %d): missing value for %s", lineNo, e.Name, item, what)
				}
				v, err := parsePLYValue(f[at], t)
				if err != nil {
					return 0, plyErr("data line %d (element %s item %d) %s: %v", lineNo, e.Name, item, what, err)
				}
				at++
				return v, nil
			}
			for pi, sp := range specs[ei] {
				p := &e.Properties[pi]
				if !p.IsList() {
					v, err := take(sp.value, p.Name)
					if err != nil {
						return err
					}
					p.Scalar = append(p.Scalar, v)
					continue
				}
				c, err := take(sp.count, p.Name+" length")
				if err != nil {
					return err
				}
				if c < 0 || int(c) > len(f)-at {
					return plyErr("data line %d (element %s item %d): list %s has length %v but the line holds %d more values", lineNo, e.Name, item, p.Name, c, len(f)-at)
				}
				list := make([]float64, 0, int(c))
				for k := 0; k < int(c); k++ {
					v, err := take(sp.value, p.Name)
					if err != nil {
						return err
					}
					list = append(list, v)
				}
				p.List = append(p.List, list)
			}
			if at != len(f) {
				return plyErr("data line %d (element %s item %d): %d values more than the header declares", lineNo, e.Name, item, len(f)-at)
			}
		}
	}
	for {
		f, err := nextLine()
		if err == io.EOF {
			return nil
		} else if err != nil {
			return plyErr("reading data: %w", err)
		}
		if len(f) > 0 {
			return plyErr("data line %d: data continue after the last element; the header counts are wrong or the file is damaged", lineNo)
		}
	}
}

// parsePLYValue parses an ascii token of type t with range checks:
// integers must be whole decimal numbers within the type's range, floats
// decimal numbers representable in the type.
func parsePLYValue(tok string, t plyType) (float64, error) {
	switch t.kind {
	case 'i':
		v, err := strconv.ParseInt(tok, 10, t.bits)
		if err != nil {
			return 0, fmt.Errorf("%q is not an %s", tok, t.canon)
		}
		return float64(v), nil
	case 'u':
		v, err := strconv.ParseUint(tok, 10, t.bits)
		if err != nil {
			return 0, fmt.Errorf("%q is not a %s", tok, t.canon)
		}
		return float64(v), nil
	default:
		if strings.ContainsAny(tok, "_xXpP") {
			return 0, fmt.Errorf("%q is not a decimal number", tok)
		}
		v, err := strconv.ParseFloat(tok, t.bits)
		if err != nil {
			return 0, fmt.Errorf("%q is not a %s", tok, t.canon)
		}
		return v, nil
	}
}

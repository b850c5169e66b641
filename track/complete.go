package track

import (
	"bytes"
	"encoding/binary"
	"errors"
	"hash/crc32"
)

// Image decoders are lenient: libjpeg fills a truncated scan with grey and
// only prints a warning, libpng prints its error to stderr before OpenCV
// returns an empty Mat. A frame that is silently half grey would be
// tracked as if the part had changed, so the bytes of PNG and JPEG frames
// are checked for completeness before they are decoded, and a damaged file
// is refused with an error naming it (and without the libraries' own
// lines on stderr).

// errIncomplete is the reason checkComplete gives for a file that ends
// before its format says it does.
var errIncomplete = errors.New("the file ends early (truncated)")

// checkComplete reports whether b holds a whole PNG or JPEG file. Other
// formats (and data that is neither) pass: the decoder judges them.
func checkComplete(b []byte) error {
	switch {
	case bytes.HasPrefix(b, pngSignature):
		return checkPNG(b)
	case len(b) >= 2 && b[0] == 0xFF && b[1] == 0xD8:
		return checkJPEG(b)
	}
	return nil
}

var pngSignature = []byte{0x89, 'P', 'N', 'G', '\r', '\n', 0x1A, '\n'}

// checkPNG walks the chunks of a PNG file (PNG specification, ISO/IEC
// 15948:2004, §5.3: length, type, data, CRC-32 over type and data) and
// wants every CRC to match and the last chunk to be IEND. Bytes after IEND
// are ignored, as decoders do.
func checkPNG(b []byte) error {
	p := len(pngSignature)
	for {
		if len(b)-p < 12 {
			return errIncomplete
		}
		n := int64(binary.BigEndian.Uint32(b[p:]))
		if n > 1<<31-1 || int64(len(b)-p-12) < n {
			return errIncomplete
		}
		end := p + 8 + int(n)
		if crc32.ChecksumIEEE(b[p+4:end]) != binary.BigEndian.Uint32(b[end:]) {
			return errors.New("a PNG chunk fails its checksum (the file is damaged)")
		}
		if string(b[p+4:p+8]) == "IEND" {
			return nil
		}
		p = end + 4
	}
}

// checkJPEG walks the marker segments of a JPEG file (ITU-T T.81, Annex B:
// every marker but SOI, EOI, RSTn and TEM is followed by a two-byte
// length; after SOS the entropy-coded data runs to the next marker that is
// not a stuffed 0xFF00 or an RSTn) and wants to reach EOI. Embedded
// thumbnails live inside APPn segments, which are skipped whole, so their
// own EOI does not count.
func checkJPEG(b []byte) error {
	p := 2 // after SOI
	for {
		// Fill bytes 0xFF may precede a marker (B.1.1.2).
		for p < len(b) && b[p] == 0xFF && p+1 < len(b) && b[p+1] == 0xFF {
			p++
		}
		if len(b)-p < 2 {
			return errIncomplete
		}
		if b[p] != 0xFF {
			return errors.New("a JPEG marker is missing where one must be (the file is damaged)")
		}
		m := b[p+1]
		p += 2
		switch {
		case m == 0xD9: // EOI
			return nil
		case m == 0x01 || m >= 0xD0 && m <= 0xD7: // TEM, RSTn: no length
			continue
		}
		if len(b)-p < 2 {
			return errIncomplete
		}
		n := int(binary.BigEndian.Uint16(b[p:]))
		if n < 2 {
			return errors.New("a JPEG segment has an impossible length (the file is damaged)")
		}
		if len(b)-p < n {
			return errIncomplete
		}
		p += n
		if m != 0xDA { // not SOS
			continue
		}
		// Entropy-coded data: skip to the next real marker.
		for {
			k := bytes.IndexByte(b[p:], 0xFF)
			if k < 0 || p+k+1 >= len(b) {
				return errIncomplete
			}
			p += k
			if next := b[p+1]; next == 0x00 || next >= 0xD0 && next <= 0xD7 {
				p += 2
				continue
			}
			break
		}
	}
}

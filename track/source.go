package track

import (
	"context"
	"encoding/binary"
	"errors"
	"fmt"
	"image"
	"image/color"
	_ "image/jpeg" // DecodeConfig for .jpg/.jpeg headers
	_ "image/png"  // DecodeConfig for .png headers
	"io"
	"os"
	"path/filepath"
	"sort"
	"strings"
	"sync"

	"gocv.io/x/gocv"
)

// MinFrames is the fewest frames a Source may hold: factorization needs at
// least three views to fix rotations and structure.
const MinFrames = 3

// Source is a sequence of frames of one size, numbered 0..Len()-1 in the
// order of the sorted input.
//
// A Source is not safe for concurrent use; the tracker calls Read from one
// goroutine at a time, normally with increasing i. Sources never modify
// their input files.
type Source interface {
	// Len is the number of frames (after the Range is applied).
	Len() int
	// Name is the name of frame i: the file name for a folder, or
	// "frame-000123" (the frame's index in the video) for a video.
	Name(i int) string
	// Size is the width and height of every frame in pixels.
	Size() (w, h int)
	// Read decodes frame i into dst as 8-bit, 3-channel BGR
	// (gocv.MatTypeCV8UC3, OpenCV's channel order). dst must be a valid
	// Mat (gocv.NewMat() will do); its memory is reused when possible and
	// its previous contents are lost. Read checks ctx before decoding.
	Read(ctx context.Context, i int, dst *gocv.Mat) error
	// Close releases what the Source holds open (a video file).
	Close() error
}

// Range selects frames of the input: Start, Start+Step, … while below End.
//
// End is exclusive. The zero value selects every frame: End 0 means "to the
// last frame", Step 0 means 1. An End past the last frame is taken as the
// last frame. Start, End and Step are indices in the input's own order
// (sorted file names, or video frame order).
type Range struct {
	Start int // first frame index, default 0
	End   int // one past the last frame index; 0 = all frames (default)
	Step  int // take every Step-th frame; 0 = 1 (default)
}

// indices applies the range to n input frames.
func (r Range) indices(n int) ([]int, error) {
	if r.Start < 0 || r.End < 0 || r.Step < 0 {
		return nil, fmt.Errorf("track: range start %d, end %d, step %d: none may be negative", r.Start, r.End, r.Step)
	}
	step := r.Step
	if step == 0 {
		step = 1
	}
	end := r.End
	if end == 0 || end > n {
		end = n
	}
	if r.Start >= end {
		return nil, fmt.Errorf("track: range start %d is at or past the end (%d of %d frames); choose a start below %d", r.Start, end, n, end)
	}
	var idx []int
	for i := r.Start; i < end; i += step {
		idx = append(idx, i)
	}
	return idx, nil
}

// String describes the range in the form start:end:step (end "" = last).
func (r Range) String() string {
	end := ""
	if r.End > 0 {
		end = fmt.Sprint(r.End)
	}
	step := r.Step
	if step == 0 {
		step = 1
	}
	return fmt.Sprintf("%d:%s:%d", r.Start, end, step)
}

// Open opens a folder of images (OpenFolder) or a video file (OpenVideo),
// chosen by whether path is a directory.
func Open(path string, r Range) (Source, error) {
	fi, err := os.Stat(path)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("track: %s does not exist; give a folder of images or a video file", path)
		}
		return nil, fmt.Errorf("track: cannot open %s: %v", path, err)
	}
	if fi.IsDir() {
		return OpenFolder(path, r)
	}
	if imageExt(path) {
		return nil, fmt.Errorf("track: %s is a single image; give the folder that holds all the frames", path)
	}
	return OpenVideo(path, r)
}

// imageExts are the file extensions OpenFolder takes (compared in lower case).
var imageExts = [...]string{".png", ".jpg", ".jpeg", ".tif", ".tiff", ".bmp"}

func imageExt(name string) bool {
	ext := strings.ToLower(filepath.Ext(name))
	for _, e := range imageExts {
		if ext == e {
			return true
		}
	}
	return false
}

// folderSource reads frames from image files in one folder.
type folderSource struct {
	dir   string
	names []string // selected file names, in frame order
	w, h  int
}

// OpenFolder opens the PNG, JPEG, TIFF and BMP files of dir (by extension,
// case-insensitive; names starting with "." are skipped; subfolders are not
// entered) as frames, sorted in natural numeric order ("2.png" before
// "10.png"), then selects frames by r.
//
// Every selected file's header is read (image.DecodeConfig or a small
// header reader for TIFF and BMP) to check that all frames have one size
// before any pixel is decoded. JPEG orientation tags are ignored: frames are
// taken as stored.
func OpenFolder(dir string, r Range) (Source, error) {
	entries, err := os.ReadDir(dir)
	if err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("track: folder %s does not exist; give a folder of images", dir)
		}
		return nil, fmt.Errorf("track: cannot read folder %s: %v", dir, err)
	}
	var names []string
	for _, e := range entries {
		n := e.Name()
		if strings.HasPrefix(n, ".") || !imageExt(n) {
			continue
		}
		if e.IsDir() {
			continue
		}
		if !e.Type().IsRegular() {
			fi, err := os.Stat(filepath.Join(dir, n)) // follow symlinks
			if err != nil || !fi.Mode().IsRegular() {
				continue
			}
		}
		names = append(names, n)
	}
	if len(names) == 0 {
		if len(entries) == 0 {
			return nil, fmt.Errorf("track: folder %s is empty; put the frames there as PNG, JPEG, TIFF or BMP files", dir)
		}
		return nil, fmt.Errorf("track: folder %s has no images (%d other entries); frames must be .png, .jpg, .jpeg, .tif, .tiff or .bmp files", dir, len(entries))
	}
	sort.Slice(names, func(i, j int) bool { return naturalLess(names[i], names[j]) })
	idx, err := r.indices(len(names))
	if err != nil {
		return nil, fmt.Errorf("track: folder %s has %d images: %w", dir, len(names), err)
	}
	sel := make([]string, len(idx))
	for k, i := range idx {
		sel[k] = names[i]
	}
	if len(sel) < MinFrames {
		return nil, fmt.Errorf("track: folder %s gives %d frames (range %s of %d images); at least %d are needed", dir, len(sel), r, len(names), MinFrames)
	}
	s := &folderSource{dir: dir, names: sel}
	for k, n := range sel {
		w, h, err := imageSize(filepath.Join(dir, n))
		if err != nil {
			return nil, err
		}
		if k == 0 {
			s.w, s.h = w, h
			continue
		}
		if w != s.w || h != s.h {
			return nil, fmt.Errorf("track: frame %s is %dx%d but %s is %dx%d; all frames must have one size", n, w, h, sel[0], s.w, s.h)
		}
	}
	return s, nil
}

func (s *folderSource) Len() int          { return len(s.names) }
func (s *folderSource) Name(i int) string { return s.names[i] }
func (s *folderSource) Size() (int, int)  { return s.w, s.h }
func (s *folderSource) Close() error      { return nil }

// imreadColorAsStored is IMREAD_COLOR | IMREAD_IGNORE_ORIENTATION (OpenCV
// imgcodecs.hpp), so decoded sizes match the headers.
const imreadColorAsStored = gocv.IMReadFlag(1 | 128)

func (s *folderSource) Read(ctx context.Context, i int, dst *gocv.Mat) error {
	if i < 0 || i >= len(s.names) {
		panic(fmt.Sprintf("track: folder source: frame %d out of range [0,%d)", i, len(s.names)))
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	path := filepath.Join(s.dir, s.names[i])
	b, err := os.ReadFile(path)
	if err != nil {
		return fmt.Errorf("track: frame %s can no longer be read: %v", s.names[i], err)
	}
	if err := checkComplete(b); err != nil {
		return fmt.Errorf("track: frame %s could not be decoded: %v; copy the frame again or leave it out (--start, --end, or move it away)", s.names[i], err)
	}
	m, err := gocv.IMDecode(b, imreadColorAsStored)
	if err != nil || m.Empty() {
		m.Close()
		return fmt.Errorf("track: frame %s could not be decoded; the file is corrupt or in an unsupported variant", s.names[i])
	}
	if m.Cols() != s.w || m.Rows() != s.h {
		w, h := m.Cols(), m.Rows()
		m.Close()
		return fmt.Errorf("track: frame %s decodes to %dx%d but its header said %dx%d; the file is corrupt", s.names[i], w, h, s.w, s.h)
	}
	dst.Close()
	*dst = m
	return nil
}

// imageSize reads the width and height from an image file's header.
func imageSize(path string) (w, h int, err error) {
	name := filepath.Base(path)
	f, err := os.Open(path)
	if err != nil {
		return 0, 0, fmt.Errorf("track: cannot read image %s: %v", name, err)
	}
	defer f.Close()
	if st, err := f.Stat(); err == nil && st.Size() == 0 {
		return 0, 0, fmt.Errorf("track: image %s is empty (0 bytes), perhaps a copy that did not finish; copy it again or remove it", name)
	}
	switch strings.ToLower(filepath.Ext(path)) {
	case ".bmp":
		w, h, err = bmpSize(f)
	case ".tif", ".tiff":
		w, h, err = tiffSize(f)
	default:
		var cfg image.Config
		cfg, _, err = image.DecodeConfig(f)
		w, h = cfg.Width, cfg.Height
	}
	if err != nil {
		return 0, 0, fmt.Errorf("track: image %s is corrupt or not an image (%v); replace or remove it", name, err)
	}
	if w <= 0 || h <= 0 {
		return 0, 0, fmt.Errorf("track: image %s has an empty size %dx%d; replace or remove it", name, w, h)
	}
	return w, h, nil
}

// bmpSize reads a Windows bitmap header: "BM", then the info header whose
// width and height are little-endian int32 at file offsets 18 and 22
// (height negative for top-down bitmaps). Old OS/2 core headers (size 12)
// hold 16-bit sizes at offsets 18 and 20.
func bmpSize(r io.Reader) (int, int, error) {
	var b [26]byte
	if _, err := io.ReadFull(r, b[:]); err != nil {
		return 0, 0, errors.New("bmp header too short")
	}
	if b[0] != 'B' || b[1] != 'M' {
		return 0, 0, errors.New("no BMP signature")
	}
	hs := binary.LittleEndian.Uint32(b[14:18])
	if hs == 12 {
		return int(binary.LittleEndian.Uint16(b[18:20])), int(binary.LittleEndian.Uint16(b[20:22])), nil
	}
	if hs < 40 {
		return 0, 0, fmt.Errorf("bmp info header of %d bytes", hs)
	}
	w := int(int32(binary.LittleEndian.Uint32(b[18:22])))
	h := int(int32(binary.LittleEndian.Uint32(b[22:26])))
	if h < 0 {
		h = -h
	}
	return w, h, nil
}

// tiffSize reads the first image file directory of a TIFF (TIFF 6.0
// specification, section 2): byte order "II"/"MM", magic 42, offset of the
// first IFD; tags 256 (ImageWidth) and 257 (ImageLength), SHORT or LONG.
func tiffSize(r io.ReadSeeker) (int, int, error) {
	var hdr [8]byte
	if _, err := io.ReadFull(r, hdr[:]); err != nil {
		return 0, 0, errors.New("tiff header too short")
	}
	var bo binary.ByteOrder
	switch string(hdr[:2]) {
	case "II":
		bo = binary.LittleEndian
	case "MM":
		bo = binary.BigEndian
	default:
		return 0, 0, errors.New("no TIFF byte-order mark")
	}
	if bo.Uint16(hdr[2:4]) != 42 {
		return 0, 0, errors.New("not a classic TIFF (magic is not 42)")
	}
	if _, err := r.Seek(int64(bo.Uint32(hdr[4:8])), io.SeekStart); err != nil {
		return 0, 0, errors.New("tiff IFD offset unreadable")
	}
	var nb [2]byte
	if _, err := io.ReadFull(r, nb[:]); err != nil {
		return 0, 0, errors.New("tiff IFD unreadable")
	}
	n := int(bo.Uint16(nb[:]))
	w, h := -1, -1
	var e [12]byte
	for k := 0; k < n; k++ {
		if _, err := io.ReadFull(r, e[:]); err != nil {
			return 0, 0, errors.New("tiff IFD truncated")
		}
		tag, typ := bo.Uint16(e[0:2]), bo.Uint16(e[2:4])
		var v int
		switch typ {
		case 3: // SHORT
			v = int(bo.Uint16(e[8:10]))
		case 4: // LONG
			v = int(bo.Uint32(e[8:12]))
		default:
			continue
		}
		switch tag {
		case 256:
			w = v
		case 257:
			h = v
		}
	}
	if w < 0 || h < 0 {
		return 0, 0, errors.New("tiff has no image width or length tag")
	}
	return w, h, nil
}

// naturalLess orders names with digit runs compared as numbers:
// "2.png" < "10.png", "f9a" < "f10a". Equal numbers with different zero
// padding ("01" vs "1") and otherwise equal names fall back to plain byte
// order ("02" before "2") so the order is total.
func naturalLess(a, b string) bool {
	i, j := 0, 0
	for i < len(a) && j < len(b) {
		ca, cb := a[i], b[j]
		if isDigit(ca) && isDigit(cb) {
			si := i
			for i < len(a) && isDigit(a[i]) {
				i++
			}
			sj := j
			for j < len(b) && isDigit(b[j]) {
				j++
			}
			na := strings.TrimLeft(a[si:i], "0")
			nb := strings.TrimLeft(b[sj:j], "0")
			if len(na) != len(nb) {
				return len(na) < len(nb)
			}
			if na != nb {
				return na < nb
			}
			continue
		}
		if ca != cb {
			return ca < cb
		}
		i++
		j++
	}
	if len(a)-i != len(b)-j {
		return len(a)-i < len(b)-j
	}
	return a < b
}

func isDigit(c byte) bool { return c >= '0' && c <= '9' }

// videoSource reads frames from a video file with OpenCV's VideoCapture.
type videoSource struct {
	path string
	idx  []int // selected frame indices in the video
	w, h int
	cap  *gocv.VideoCapture
	next int // index of the frame the capture reads next
	// total is the frame count the container announced.
	total int
	// ahead holds frame aheadIdx, read after the frame before it to see
	// whether that one was the last to decode (aheadIdx −1: none).
	ahead    gocv.Mat
	aheadIdx int
}

// OpenVideo opens a video file through OpenCV's VideoCapture (the codecs
// of the installed OpenCV build) and selects frames by r. Frames are named
// "frame-000123" after their index in the video. Frames are read
// sequentially; reading an earlier frame reopens the file.
//
// The frame count is the container's (CAP_PROP_FRAME_COUNT); when the
// container does not give one the file is read through once to count.
func OpenVideo(path string, r Range) (Source, error) {
	if _, err := os.Stat(path); err != nil {
		if errors.Is(err, os.ErrNotExist) {
			return nil, fmt.Errorf("track: video %s does not exist; give a video file or a folder of images", path)
		}
		return nil, fmt.Errorf("track: cannot open video %s: %v", path, err)
	}
	vc, err := openCapture(path)
	if err != nil {
		return nil, fmt.Errorf("track: %s could not be opened as a video (unknown format or codec); convert it or extract its frames into a folder", path)
	}
	n := int(vc.Get(gocv.VideoCaptureFrameCount))
	w := int(vc.Get(gocv.VideoCaptureFrameWidth))
	h := int(vc.Get(gocv.VideoCaptureFrameHeight))
	if n <= 0 || w <= 0 || h <= 0 {
		// Count (and size) by reading through once.
		m := gocv.NewMat()
		n = 0
		for vc.Read(&m) {
			if n == 0 {
				w, h = m.Cols(), m.Rows()
			}
			n++
		}
		m.Close()
		vc.Close()
		vc, err = openCapture(path)
		if err != nil {
			return nil, fmt.Errorf("track: video %s could not be reopened: %v", path, err)
		}
	}
	if n == 0 {
		vc.Close()
		return nil, fmt.Errorf("track: video %s has no frames; check the file", path)
	}
	idx, err := r.indices(n)
	if err != nil {
		vc.Close()
		return nil, fmt.Errorf("track: video %s has %d frames: %w", path, n, err)
	}
	if len(idx) < MinFrames {
		vc.Close()
		return nil, fmt.Errorf("track: video %s gives %d frames (range %s of %d); at least %d are needed", path, len(idx), r, n, MinFrames)
	}
	return &videoSource{path: path, idx: idx, w: w, h: h, cap: vc, total: n, ahead: gocv.NewMat(), aheadIdx: -1}, nil
}

// quietFFmpeg silences FFmpeg's log once per process (the setting is the
// process's environment, so there is one).
var quietFFmpeg sync.Once

// openCapture opens a video with OpenCV's FFmpeg backend first (it reads
// the common containers and says little on failure), then with any
// backend the build has.
func openCapture(path string) (*gocv.VideoCapture, error) {
	quietFFmpeg.Do(func() {
		// OpenCV's FFmpeg backend reads OPENCV_FFMPEG_LOGLEVEL once, when
		// it first opens a file; without it FFmpeg prints its own error
		// lines ("overread", "invalid data") on stderr beside ours. −8 is
		// AV_LOG_QUIET. A value the user set is kept.
		if _, set := os.LookupEnv("OPENCV_FFMPEG_LOGLEVEL"); !set {
			os.Setenv("OPENCV_FFMPEG_LOGLEVEL", "-8")
		}
	})
	for _, api := range []gocv.VideoCaptureAPI{gocv.VideoCaptureFFmpeg, gocv.VideoCaptureAny} {
		vc, err := gocv.VideoCaptureFileWithAPI(path, api)
		if err == nil && vc.IsOpened() {
			return vc, nil
		}
		if vc != nil {
			vc.Close()
		}
	}
	return nil, errors.New("no backend opened it")
}

func (s *videoSource) Len() int          { return len(s.idx) }
func (s *videoSource) Name(i int) string { return fmt.Sprintf("frame-%06d", s.idx[i]) }
func (s *videoSource) Size() (int, int)  { return s.w, s.h }

func (s *videoSource) Close() error {
	if s.cap == nil {
		return nil
	}
	err := s.cap.Close()
	s.cap = nil
	s.ahead.Close()
	return err
}

func (s *videoSource) Read(ctx context.Context, i int, dst *gocv.Mat) error {
	if i < 0 || i >= len(s.idx) {
		panic(fmt.Sprintf("track: video source: frame %d out of range [0,%d)", i, len(s.idx)))
	}
	if s.cap == nil {
		panic("track: video source: Read after Close")
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	want := s.idx[i]
	if err := s.readAt(want, dst); err != nil {
		return err
	}
	// A file cut short usually ends inside a frame, which the decoder
	// still returns, partly grey or repeated: a frame counts as read only
	// once the one after it decodes too (the last announced frame has
	// none after it). The frame read ahead serves the next call.
	if want+1 < s.total {
		if !s.cap.Read(&s.ahead) || s.ahead.Empty() {
			return &SourceEndedError{Frame: want, Path: s.path}
		}
		s.aheadIdx, s.next = want+1, want+2
	}
	return s.checkFrame(want, dst)
}

// readAt puts video frame want into dst: the frame read ahead, or read
// from the capture (reopened to go back, grabbing to skip forward).
func (s *videoSource) readAt(want int, dst *gocv.Mat) error {
	if want == s.aheadIdx {
		dst.Close()
		*dst, s.ahead = s.ahead, gocv.NewMat()
		s.aheadIdx = -1
		return nil
	}
	s.aheadIdx = -1
	if want < s.next {
		s.cap.Close()
		vc, err := openCapture(s.path)
		if err != nil {
			s.cap = nil
			return fmt.Errorf("track: video %s could not be reopened to seek back: %v", s.path, err)
		}
		s.cap, s.next = vc, 0
	}
	if skip := want - s.next; skip > 0 {
		s.cap.Grab(skip)
		s.next = want
	}
	if !s.cap.Read(dst) || dst.Empty() {
		return &SourceEndedError{Frame: want, Path: s.path}
	}
	s.next = want + 1
	return nil
}

// checkFrame checks the size of a decoded video frame and brings it to
// 8-bit BGR.
func (s *videoSource) checkFrame(want int, dst *gocv.Mat) error {
	if dst.Cols() != s.w || dst.Rows() != s.h {
		return fmt.Errorf("track: video %s: frame %d is %dx%d but the video is %dx%d", s.path, want, dst.Cols(), dst.Rows(), s.w, s.h)
	}
	if dst.Type() != gocv.MatTypeCV8UC3 {
		if dst.Channels() == 1 {
			gocv.CvtColor(*dst, dst, gocv.ColorGrayToBGR)
		} else {
			return fmt.Errorf("track: video %s: frames of type %v are not supported; convert to 8-bit colour", s.path, dst.Type())
		}
	}
	return nil
}

// memorySource holds frames in memory (tests, synthetic scenes, callers
// that decode frames themselves).
type memorySource struct {
	names []string
	imgs  []image.Image
	w, h  int
}

// FromImages makes a Source of in-memory images. names may be nil (frames
// are then named "frame-000000", …); otherwise it must have one name per
// image. All images must have one size and there must be at least
// MinFrames; the images are not copied and must not change while the
// Source is in use.
func FromImages(imgs []image.Image, names []string) (Source, error) {
	if names != nil && len(names) != len(imgs) {
		panic(fmt.Sprintf("track: FromImages: %d names for %d images", len(names), len(imgs)))
	}
	if len(imgs) < MinFrames {
		return nil, fmt.Errorf("track: %d in-memory frames given; at least %d are needed", len(imgs), MinFrames)
	}
	s := &memorySource{imgs: imgs}
	if names == nil {
		names = make([]string, len(imgs))
		for i := range names {
			names[i] = fmt.Sprintf("frame-%06d", i)
		}
	}
	s.names = names
	for i, im := range imgs {
		if im == nil {
			return nil, fmt.Errorf("track: in-memory frame %s is nil", names[i])
		}
		b := im.Bounds()
		if i == 0 {
			s.w, s.h = b.Dx(), b.Dy()
			if s.w <= 0 || s.h <= 0 {
				return nil, fmt.Errorf("track: in-memory frame %s has an empty size %dx%d", names[0], s.w, s.h)
			}
			continue
		}
		if b.Dx() != s.w || b.Dy() != s.h {
			return nil, fmt.Errorf("track: frame %s is %dx%d but %s is %dx%d; all frames must have one size", names[i], b.Dx(), b.Dy(), names[0], s.w, s.h)
		}
	}
	return s, nil
}

func (s *memorySource) Len() int          { return len(s.imgs) }
func (s *memorySource) Name(i int) string { return s.names[i] }
func (s *memorySource) Size() (int, int)  { return s.w, s.h }
func (s *memorySource) Close() error      { return nil }

func (s *memorySource) Read(ctx context.Context, i int, dst *gocv.Mat) error {
	if err := ctx.Err(); err != nil {
		return err
	}
	imageToBGR(s.imgs[i], dst)
	return nil
}

// imageToBGR converts any image.Image to an 8-bit BGR Mat in dst, reusing
// dst's memory when it already has the right size and type.
func imageToBGR(im image.Image, dst *gocv.Mat) {
	b := im.Bounds()
	w, h := b.Dx(), b.Dy()
	if dst.Rows() != h || dst.Cols() != w || dst.Type() != gocv.MatTypeCV8UC3 || !dst.IsContinuous() {
		dst.Close()
		*dst = gocv.NewMatWithSize(h, w, gocv.MatTypeCV8UC3)
	}
	px, err := dst.DataPtrUint8()
	if err != nil {
		panic("track: BGR Mat has no data: " + err.Error())
	}
	switch m := im.(type) {
	case *image.RGBA:
		// RGBA is alpha-premultiplied; frames are taken as opaque.
		rgbaRowsToBGR(px, m.Pix, m.Stride, m.PixOffset(b.Min.X, b.Min.Y), w, h)
	case *image.NRGBA:
		rgbaRowsToBGR(px, m.Pix, m.Stride, m.PixOffset(b.Min.X, b.Min.Y), w, h)
	case *image.Gray:
		for y := 0; y < h; y++ {
			o0 := m.PixOffset(b.Min.X, b.Min.Y+y)
			row := m.Pix[o0 : o0+w]
			o := px[y*3*w : (y+1)*3*w]
			for x := 0; x < w; x++ {
				v := row[x]
				o[3*x], o[3*x+1], o[3*x+2] = v, v, v
			}
		}
	default:
		for y := 0; y < h; y++ {
			o := px[y*3*w : (y+1)*3*w]
			for x := 0; x < w; x++ {
				c := color.RGBAModel.Convert(im.At(b.Min.X+x, b.Min.Y+y)).(color.RGBA)
				o[3*x], o[3*x+1], o[3*x+2] = c.B, c.G, c.R
			}
		}
	}
}

// rgbaRowsToBGR copies h rows of w 4-byte RGBA pixels (row stride stride,
// first pixel at off) into the packed 3-byte BGR buffer px, dropping alpha.
func rgbaRowsToBGR(px, pix []uint8, stride, off, w, h int) {
	for y := 0; y < h; y++ {
		o0 := off + y*stride
		row := pix[o0 : o0+4*w]
		o := px[y*3*w : (y+1)*3*w]
		for x := 0; x < w; x++ {
			o[3*x], o[3*x+1], o[3*x+2] = row[4*x+2], row[4*x+1], row[4*x]
		}
	}
}

// SourceEndedError is returned by a video Source whose frame cannot be
// read although the container announced it: the file is damaged or cut
// short. Run keeps the frames read before it when there are at least
// MinFrames of them (Stats.Stopped says so) and fails otherwise.
type SourceEndedError struct {
	Path  string
	Frame int // index of the frame in the video
}

func (e *SourceEndedError) Error() string {
	return fmt.Sprintf("track: video %s stopped decoding at frame %d (the file is damaged or cut short); choose a range that ends before frame %d", e.Path, e.Frame, e.Frame)
}

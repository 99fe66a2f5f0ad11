package consumer

import (
	"fmt"
	"os"
	"time"

	"go.uber.org/zap"
	"go.uber.org/zap/zapcore"
)

// NewLogger returns a logger writing to stderr at info level: JSON lines
// for encoding "json" or "" (the default), human-readable lines for
// "console". Repeated identical messages are sampled (the first 100 per
// second, then every 100th) so a flood of rejected events cannot swamp the
// log. Log with fields (zap.String, ...), not formatted messages.
func NewLogger(encoding string) (*zap.Logger, error) {
	return newLogger(encoding, zapcore.Lock(os.Stderr))
}

func newLogger(encoding string, out zapcore.WriteSyncer) (*zap.Logger, error) {
	ec := zapcore.EncoderConfig{
		TimeKey:        "ts",
		LevelKey:       "level",
		NameKey:        "logger",
		CallerKey:      "caller",
		MessageKey:     "msg",
		StacktraceKey:  "stacktrace",
		LineEnding:     zapcore.DefaultLineEnding,
		EncodeLevel:    zapcore.LowercaseLevelEncoder,
		EncodeTime:     zapcore.RFC3339NanoTimeEncoder,
		EncodeDuration: zapcore.StringDurationEncoder,
		EncodeCaller:   zapcore.ShortCallerEncoder,
	}
	var enc zapcore.Encoder
	switch encoding {
	case "", LogJSON:
		enc = zapcore.NewJSONEncoder(ec)
	case LogConsole:
		ec.EncodeLevel = zapcore.CapitalLevelEncoder
		enc = zapcore.NewConsoleEncoder(ec)
	default:
		return nil, fmt.Errorf("log encoding %q: want %s or %s", encoding, LogJSON, LogConsole)
	}
	core := zapcore.NewCore(enc, out, zapcore.InfoLevel)
	core = zapcore.NewSamplerWithOptions(core, time.Second, 100, 100)
	return zap.New(core, zap.AddCaller(), zap.AddStacktrace(zapcore.ErrorLevel), zap.ErrorOutput(out)), nil
}

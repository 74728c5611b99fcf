/* yamltree.c: strict YAML loading on libyaml's event API (see yamltree.h).
 *
 * Why events and not yaml_parser_load(): the loader shares aliased nodes
 * (an alias bomb loads small but walks huge) and accepts duplicate keys and
 * unbounded nesting; with events we refuse those while streaming.
 */
#include "yamltree.h"
#include "numparse.h"

#include "text.h"

#include <errno.h>
#include <math.h>
#include <stdarg.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>
#include <yaml.h>

typedef struct frame {
	yt_node_t *node;
	yt_node_t *pending_key; /* map: key waiting for its value */
	bool skip_value;        /* map: the key was bad; drop its value */
	/* map: an open-addressing index of node->keys by their text, so the
	 * duplicate check stays linear in the number of keys (a scan per key
	 * was quadratic: 20,000 keys took a second). Slots hold key index + 1,
	 * 0 is empty; keys[0..indexed) are in it. NULL for small maps. */
	size_t *slots;
	size_t nslots; /* a power of two, at least twice `indexed` */
	size_t indexed;
} frame_t;

typedef struct loader {
	const char *name;
	const char *text;
	size_t len;
	diag_list_t *d;
	frame_t stack[YT_MAX_DEPTH + 1];
	int depth;
	yt_node_t *root;
	int errors;
	int documents;
	size_t key_compares; /* see yt_doc_t */
} loader_t;

static void node_free(yt_node_t *n)
{
	if (!n)
		return;
	for (size_t i = 0; i < n->n; i++) {
		if (n->keys)
			node_free(n->keys[i]);
		if (n->items)
			node_free(n->items[i]);
	}
	free(n->keys);
	free(n->items);
	free(n->str);
	free(n);
}

static yt_node_t *node_new(yt_kind_t kind, const yaml_mark_t *m)
{
	yt_node_t *n = calloc(1, sizeof *n);
	if (!n)
		return NULL;
	n->kind = kind;
	n->line = (int)m->line + 1;
	n->col = (int)m->column + 1;
	return n;
}

static void lerr(loader_t *L, int line, int col, const char *fmt, ...)
    __attribute__((format(printf, 4, 5)));
static void lerr(loader_t *L, int line, int col, const char *fmt, ...)
{
	char buf[512];
	va_list ap;
	va_start(ap, fmt);
	vsnprintf(buf, sizeof buf, fmt, ap);
	va_end(ap);
	diag_add(L->d, L->name, line, col, "%s", buf);
	L->errors++;
}

/* 1-based line/column of a byte offset, counting columns in characters. */
static void offset_to_pos(const char *text, size_t len, size_t off, int *line, int *col)
{
	int l = 1, c = 1;
	for (size_t i = 0; i < off && i < len; i++) {
		unsigned char ch = (unsigned char)text[i];
		if (ch == '\n') {
			l++;
			c = 1;
		} else if ((ch & 0xC0) != 0x80) {
			c++;
		}
	}
	*line = l;
	*col = c;
}

/* A plain account of a syntax error libyaml reported. libyaml notices most
 * mistakes only where it can no longer go on, often a line later and in its
 * own terms; this scan looks for the usual slips of a hand-written method at
 * the place they are made. Returns true and fills line/col/msg if it found
 * one at or before the line where libyaml stopped. */
typedef struct hint {
	int line, col;
	char msg[200];
} hint_t;

#define HINT_MAX_LEVELS 64
#define HINT_MAX_FLOW   64

static bool hint_key_at(const char *s, const char *end, const char **colon)
{
	const char *p = s;
	if (p >= end || !((*p >= 'a' && *p <= 'z') || (*p >= 'A' && *p <= 'Z') || *p == '_'))
		return false;
	while (p < end && ((*p >= 'a' && *p <= 'z') || (*p >= 'A' && *p <= 'Z') ||
	                   (*p >= '0' && *p <= '9') || *p == '_' || *p == '-'))
		p++;
	if (p >= end || *p != ':')
		return false;
	*colon = p;
	return true;
}

static bool syntax_hint(const char *text, size_t len, int stop_line, hint_t *h)
{
	int levels[HINT_MAX_LEVELS] = {0};
	int n_levels = 1;
	bool open_child = false; /* the line above ends in "key:" or "-" */
	struct {
		char ch;
		int line, col, indent;
	} flow[HINT_MAX_FLOW], quote = {0, 0, 0, 0};
	int depth = 0, ln = 0;
	const char *p = text, *end = text + len;

	while (p < end && ln < stop_line) {
		const char *eol = memchr(p, '\n', (size_t)(end - p));
		const char *s = p, *c;
		int indent;
		if (!eol)
			eol = end;
		ln++;
		while (s < eol && (*s == ' ' || *s == '\t'))
			s++;
		indent = (int)(s - p);
		if (s < eol && *s == '\r')
			s = eol;
		if (depth > 0 || quote.ch) {
			/* Inside an open bracket or quote: a new key at the opener's
			 * indent or less means the closer was forgotten. */
			const char *colon;
			int o_line = quote.ch ? quote.line : flow[depth - 1].line;
			int o_col = quote.ch ? quote.col : flow[depth - 1].col;
			int o_ind = quote.ch ? quote.indent : flow[depth - 1].indent;
			char o = quote.ch ? quote.ch : flow[depth - 1].ch;
			if (s < eol && indent <= o_ind && hint_key_at(s, eol, &colon)) {
				h->line = o_line;
				h->col = o_col;
				snprintf(
				    h->msg, sizeof h->msg,
				    "this %c is never closed: end the value with %c on line %d", o,
				    o == '['   ? ']'
				    : o == '{' ? '}'
				               : o,
				    o_line);
				return true;
			}
		} else if (s < eol && *s != '#') {
			for (const char *t = p; t < s; t++)
				if (*t == '\t') {
					h->line = ln;
					h->col = (int)(t - p) + 1;
					snprintf(
					    h->msg, sizeof h->msg,
					    "a tab indents this line; indent with spaces only");
					return true;
				}
			while (n_levels > 1 && indent < levels[n_levels - 1])
				n_levels--;
			if (indent > levels[n_levels - 1]) {
				if (open_child && n_levels < HINT_MAX_LEVELS) {
					levels[n_levels++] = indent;
				} else if (hint_key_at(s, eol, &c)) {
					h->line = ln;
					h->col = indent + 1;
					snprintf(
					    h->msg, sizeof h->msg,
					    "indentation does not match: this key starts at column "
					    "%d, the keys above it at column %d",
					    indent + 1, levels[n_levels - 1] + 1);
					return true;
				}
			} else if (indent != levels[n_levels - 1]) {
				h->line = ln;
				h->col = indent + 1;
				snprintf(
				    h->msg, sizeof h->msg,
				    "indentation does not match: this line starts at column %d, "
				    "the lines it could belong to at column %d or %d",
				    indent + 1, levels[n_levels - 1] + 1,
				    n_levels > 1 ? levels[n_levels - 2] + 1 : 1);
				return true;
			}
			/* "- key: value": the item's keys line up after the dash */
			while (s + 1 < eol && s[0] == '-' && s[1] == ' ') {
				s += 2;
				while (s < eol && *s == ' ')
					s++;
				if (n_levels < HINT_MAX_LEVELS)
					levels[n_levels++] = (int)(s - p);
			}
			open_child = s + 1 == eol && *s == '-';
			if (hint_key_at(s, eol, &c)) {
				const char *v = c + 1;
				if (v < eol && *v != ' ' && *v != '\r' && *v != '#') {
					int klen = (int)(c - s), vlen = 0;
					while (v + vlen < eol && v[vlen] != ' ' &&
					       v[vlen] != '\r' && vlen < 40)
						vlen++;
					h->line = ln;
					h->col = (int)(v - p) + 1;
					snprintf(h->msg, sizeof h->msg,
					         "missing space after ':' (write '%.*s: %.*s')",
					         klen > 60 ? 60 : klen, s, vlen, v);
					return true;
				}
				while (v < eol && *v == ' ')
					v++;
				open_child = v >= eol || *v == '#' || *v == '\r';
				s = v;
			}
		}
		/* Follow brackets and quotes through the rest of the line. */
		{
			bool value_start = depth == 0 && !quote.ch;
			for (c = s; c < eol; c++) {
				if (quote.ch) {
					if (quote.ch == '"' && *c == '\\' && c + 1 < eol)
						c++;
					else if (*c == quote.ch && quote.ch == '\'' &&
					         c + 1 < eol && c[1] == '\'')
						c++;
					else if (*c == quote.ch)
						quote.ch = 0;
					continue;
				}
				if (*c == '#' && (c == p || c[-1] == ' '))
					break;
				if ((*c == '"' || *c == '\'') && value_start) {
					quote.ch = *c;
					quote.line = ln;
					quote.col = (int)(c - p) + 1;
					quote.indent = indent;
					continue;
				}
				if ((*c == '[' || *c == '{') && value_start) {
					if (depth < HINT_MAX_FLOW) {
						flow[depth].ch = *c;
						flow[depth].line = ln;
						flow[depth].col = (int)(c - p) + 1;
						flow[depth].indent = indent;
						depth++;
					}
					continue;
				}
				if ((*c == ']' || *c == '}') && depth > 0)
					depth--;
				if (*c == ' ')
					continue;
				value_start = depth > 0 && (*c == ',' || *c == ':');
			}
		}
		p = eol < end ? eol + 1 : end;
	}
	if ((depth > 0 || quote.ch) && p >= end) {
		char o = quote.ch ? quote.ch : flow[depth - 1].ch;
		h->line = quote.ch ? quote.line : flow[depth - 1].line;
		h->col = quote.ch ? quote.col : flow[depth - 1].col;
		snprintf(h->msg, sizeof h->msg, "this %c is never closed: end the value with %c", o,
		         o == '['   ? ']'
		         : o == '{' ? '}'
		                    : o);
		return true;
	}
	return false;
}

static bool push_item(yt_node_t *parent, yt_node_t *key, yt_node_t *val)
{
	/* The capacity is 4, then doubles each time n reaches a power of two
	 * (so it needs no field): growing by one item copied the array each
	 * time. cap == 0: there is room. */
	size_t n = parent->n, cap = n == 0 ? 4 : (n >= 4 && (n & (n - 1)) == 0 ? 2 * n : 0);
	yt_node_t **items = cap ? realloc(parent->items, cap * sizeof *items) : parent->items;
	if (!items)
		return false;
	parent->items = items;
	if (parent->kind == YT_MAP) {
		yt_node_t **keys = cap ? realloc(parent->keys, cap * sizeof *keys) : parent->keys;
		if (!keys)
			return false;
		parent->keys = keys;
		keys[parent->n] = key;
	}
	items[parent->n] = val;
	parent->n++;
	return true;
}

#define KEY_INDEX_MIN 8 /* keys a map has before it gets an index */

static size_t key_hash(const char *s)
{
	uint64_t h = 14695981039346656037u; /* FNV-1a, 64 bit */
	for (; *s; s++)
		h = (h ^ (unsigned char)*s) * 1099511628211u;
	return (size_t)h;
}

static void key_index_put(frame_t *f, size_t i)
{
	size_t mask = f->nslots - 1, s = key_hash(f->node->keys[i]->str) & mask;
	while (f->slots[s])
		s = (s + 1) & mask;
	f->slots[s] = i + 1;
}

/* The earlier key of f's map with this text, or NULL. Small maps (and any
 * map when memory runs out) are scanned; larger ones use the index. */
static const yt_node_t *find_key(loader_t *L, frame_t *f, const char *str)
{
	yt_node_t *m = f->node;
	size_t mask, s;

	if (m->n >= KEY_INDEX_MIN && m->n * 2 >= f->nslots) {
		size_t cap = 4 * KEY_INDEX_MIN;
		size_t *slots;
		while (cap < m->n * 4)
			cap *= 2;
		slots = calloc(cap, sizeof *slots);
		if (slots) {
			free(f->slots);
			f->slots = slots;
			f->nslots = cap;
			f->indexed = 0;
		}
	}
	if (!f->slots || m->n * 2 >= f->nslots) {
		for (size_t i = 0; i < m->n; i++) {
			L->key_compares++;
			if (!strcmp(m->keys[i]->str, str))
				return m->keys[i];
		}
		return NULL;
	}
	for (; f->indexed < m->n; f->indexed++)
		key_index_put(f, f->indexed);
	mask = f->nslots - 1;
	for (s = key_hash(str) & mask; f->slots[s]; s = (s + 1) & mask) {
		L->key_compares++;
		if (!strcmp(m->keys[f->slots[s] - 1]->str, str))
			return m->keys[f->slots[s] - 1];
	}
	return NULL;
}

static void frame_drop_index(frame_t *f)
{
	free(f->slots);
	f->slots = NULL;
	f->nslots = f->indexed = 0;
}

/* Attach a finished node to its parent (or make it the root). */
static void attach(loader_t *L, yt_node_t *n)
{
	frame_t *f;
	if (L->depth == 0) {
		if (L->root)
			node_free(L->root);
		L->root = n;
		return;
	}
	f = &L->stack[L->depth - 1];
	if (f->node->kind == YT_SEQ) {
		if (!push_item(f->node, NULL, n))
			node_free(n);
		return;
	}
	if (!f->pending_key && !f->skip_value) {
		/* n is a key */
		if (n->kind != YT_SCALAR) {
			lerr(L, n->line, n->col, "a key must be a plain word, not a %s",
			     n->kind == YT_MAP ? "mapping" : "list");
			node_free(n);
			f->skip_value = true;
			return;
		}
		const yt_node_t *first = find_key(L, f, n->str);
		if (first) {
			lerr(L, n->line, n->col, "duplicate key '%s' (first given at line %d)",
			     n->str, first->line);
			node_free(n);
			f->skip_value = true;
			return;
		}
		f->pending_key = n;
		return;
	}
	if (f->skip_value) {
		node_free(n);
		f->skip_value = false;
		return;
	}
	if (!push_item(f->node, f->pending_key, n)) {
		node_free(f->pending_key);
		node_free(n);
	}
	f->pending_key = NULL;
}

static bool check_props(loader_t *L, const yaml_event_t *ev, const yaml_char_t *anchor,
                        const yaml_char_t *tag, bool implicit_tag)
{
	int line = (int)ev->start_mark.line + 1, col = (int)ev->start_mark.column + 1;
	bool ok = true;
	if (anchor) {
		lerr(L, line, col, "anchors (&%s) are not allowed; write the value out in full",
		     (const char *)anchor);
		ok = false;
	}
	if (tag && !implicit_tag) {
		lerr(L, line, col, "tags (%s) are not allowed", (const char *)tag);
		ok = false;
	}
	return ok;
}

static int handle_event(loader_t *L, yaml_event_t *ev)
{
	yt_node_t *n;
	int line = (int)ev->start_mark.line + 1, col = (int)ev->start_mark.column + 1;

	switch (ev->type) {
	case YAML_DOCUMENT_START_EVENT:
		if (++L->documents > 1) {
			lerr(L, line, col, "only one YAML document per file (found a second one)");
			return -1;
		}
		return 0;
	case YAML_ALIAS_EVENT:
		lerr(L, line, col, "aliases (*%s) are not allowed; write the value out in full",
		     (const char *)ev->data.alias.anchor);
		n = node_new(YT_SCALAR, &ev->start_mark);
		if (!n)
			return -1;
		n->str = strdup("");
		attach(L, n);
		return 0;
	case YAML_SCALAR_EVENT:
		check_props(L, ev, ev->data.scalar.anchor, ev->data.scalar.tag,
		            ev->data.scalar.plain_implicit || ev->data.scalar.quoted_implicit);
		n = node_new(YT_SCALAR, &ev->start_mark);
		if (!n)
			return -1;
		n->len = ev->data.scalar.length;
		n->str = malloc(n->len + 1);
		if (!n->str) {
			free(n);
			return -1;
		}
		memcpy(n->str, ev->data.scalar.value, n->len);
		n->str[n->len] = '\0';
		if (strlen(n->str) != n->len) {
			lerr(L, line, col, "a NUL character is not allowed in a value");
			n->str[0] = '\0';
			n->len = 0;
		}
		n->plain = ev->data.scalar.style == YAML_PLAIN_SCALAR_STYLE;
		attach(L, n);
		return 0;
	case YAML_SEQUENCE_START_EVENT:
	case YAML_MAPPING_START_EVENT: {
		bool is_map = ev->type == YAML_MAPPING_START_EVENT;
		if (is_map)
			check_props(L, ev, ev->data.mapping_start.anchor,
			            ev->data.mapping_start.tag, ev->data.mapping_start.implicit);
		else
			check_props(L, ev, ev->data.sequence_start.anchor,
			            ev->data.sequence_start.tag, ev->data.sequence_start.implicit);
		if (L->depth >= YT_MAX_DEPTH) {
			lerr(L, line, col, "nesting is deeper than %d levels", YT_MAX_DEPTH);
			return -1;
		}
		n = node_new(is_map ? YT_MAP : YT_SEQ, &ev->start_mark);
		if (!n)
			return -1;
		L->stack[L->depth] = (frame_t){.node = n};
		L->depth++;
		return 0;
	}
	case YAML_SEQUENCE_END_EVENT:
	case YAML_MAPPING_END_EVENT: {
		frame_t *f = &L->stack[L->depth - 1];
		n = f->node;
		node_free(f->pending_key); /* cannot happen in valid YAML; be safe */
		f->pending_key = NULL;
		frame_drop_index(f);
		L->depth--;
		attach(L, n);
		return 0;
	}
	default:
		return 0;
	}
}

static void loader_unwind(loader_t *L)
{
	while (L->depth > 0) {
		frame_t *f = &L->stack[--L->depth];
		frame_drop_index(f);
		node_free(f->pending_key);
		node_free(f->node);
	}
}

int yt_load_buffer(const char *name, const char *buf, size_t len, yt_doc_t *doc, diag_list_t *d)
{
	loader_t L;
	yaml_parser_t parser;
	int rc = 0;

	memset(doc, 0, sizeof *doc);
	memset(&L, 0, sizeof L);
	L.name = name;
	L.d = d;
	doc->file = strdup(name ? name : "");
	if (len > YT_MAX_BYTES) {
		diag_add(d, name, 1, 1, "file is too large: %zu bytes (at most %d KiB)", len,
		         YT_MAX_BYTES / 1024);
		return -1;
	}
	doc->text = malloc(len + 1);
	if (!doc->text || !doc->file) {
		diag_add(d, name, 0, 0, "out of memory");
		return -1;
	}
	memcpy(doc->text, buf, len);
	doc->text[len] = '\0';
	doc->text_len = len;
	L.text = doc->text;
	L.len = len;

	if (!yaml_parser_initialize(&parser)) {
		diag_add(d, name, 0, 0, "cannot start the YAML parser (out of memory)");
		return -1;
	}
	yaml_parser_set_input_string(&parser, (const unsigned char *)doc->text, len);
	for (;;) {
		yaml_event_t ev;
		if (!yaml_parser_parse(&parser, &ev)) {
			int line, col;
			if (parser.error == YAML_READER_ERROR) {
				size_t off = parser.problem_offset;
				/* libyaml points past an incomplete sequence's lead byte;
				 * point at the lead byte, where the user must look. */
				if (off > 0 && off <= len &&
				    ((unsigned char)doc->text[off - 1] & 0xC0) == 0xC0)
					off--;
				offset_to_pos(doc->text, len, off, &line, &col);
				lerr(&L, line, col, "%s (the file must be UTF-8 text)",
				     parser.problem ? parser.problem : "unreadable bytes");
			} else {
				hint_t h;
				line = (int)parser.problem_mark.line + 1;
				col = (int)parser.problem_mark.column + 1;
				if (syntax_hint(doc->text, len, line, &h))
					lerr(&L, h.line, h.col, "YAML syntax: %s", h.msg);
				else if (parser.context)
					lerr(&L, line, col, "YAML syntax: %s %s", parser.problem,
					     parser.context);
				else
					lerr(&L, line, col, "YAML syntax: %s",
					     parser.problem ? parser.problem : "error");
			}
			rc = -1;
			break;
		}
		yaml_event_type_t type = ev.type;
		int hr = handle_event(&L, &ev);
		yaml_event_delete(&ev);
		if (hr < 0) {
			rc = -1;
			break;
		}
		if (type == YAML_STREAM_END_EVENT)
			break;
	}
	yaml_parser_delete(&parser);
	loader_unwind(&L);
	if (rc == 0 && !L.root && L.errors == 0) {
		diag_add(d, name, 1, 1, "the file is empty");
		rc = -1;
	}
	if (rc == 0 && L.root && L.root->kind == YT_SCALAR && yt_is_null(L.root) && L.errors == 0) {
		diag_add(d, name, 1, 1, "the file is empty");
		rc = -1;
	}
	if (L.errors)
		rc = -1;
	if (rc != 0) {
		node_free(L.root);
		L.root = NULL;
	}
	doc->root = L.root;
	doc->key_compares = L.key_compares;
	return rc;
}

int yt_load_file(const char *path, yt_doc_t *doc, diag_list_t *d)
{
	FILE *f = fopen(path, "rb");
	char *buf;
	size_t len = 0;
	int rc;
	memset(doc, 0, sizeof *doc);
	if (!f) {
		diag_add(d, path, 0, 0, "cannot open: %s", strerror(errno));
		return -1;
	}
	/* Read one byte past the limit, so "too large" is detected without
	 * trusting a size that may change under us. */
	buf = malloc(YT_MAX_BYTES + 2);
	if (!buf) {
		fclose(f);
		diag_add(d, path, 0, 0, "out of memory");
		return -1;
	}
	len = fread(buf, 1, YT_MAX_BYTES + 1, f);
	if (ferror(f)) {
		diag_add(d, path, 0, 0, "cannot read: %s", strerror(errno));
		fclose(f);
		free(buf);
		return -1;
	}
	if (len > YT_MAX_BYTES) {
		long total;
		fseek(f, 0, SEEK_END);
		total = ftell(f);
		diag_add(d, path, 1, 1, "file is too large: %ld bytes (at most %d KiB)", total,
		         YT_MAX_BYTES / 1024);
		fclose(f);
		free(buf);
		return -1;
	}
	fclose(f);
	rc = yt_load_buffer(path, buf, len, doc, d);
	free(buf);
	return rc;
}

void yt_free(yt_doc_t *doc)
{
	if (!doc)
		return;
	node_free(doc->root);
	free(doc->file);
	free(doc->text);
	memset(doc, 0, sizeof *doc);
}

/* ---- navigation ---- */

const yt_node_t *yt_get(const yt_node_t *m, const char *key)
{
	if (!m || m->kind != YT_MAP)
		return NULL;
	for (size_t i = 0; i < m->n; i++)
		if (!strcmp(m->keys[i]->str, key))
			return m->items[i];
	return NULL;
}

const yt_node_t *yt_key(const yt_node_t *m, const char *key)
{
	if (!m || m->kind != YT_MAP)
		return NULL;
	for (size_t i = 0; i < m->n; i++)
		if (!strcmp(m->keys[i]->str, key))
			return m->keys[i];
	return NULL;
}

bool yt_is_null(const yt_node_t *n)
{
	if (!n)
		return true;
	if (n->kind != YT_SCALAR || !n->plain)
		return false;
	return !strcmp(n->str, "") || !strcmp(n->str, "~") || !strcmp(n->str, "null") ||
	       !strcmp(n->str, "Null") || !strcmp(n->str, "NULL");
}

/* ---- errors ---- */

void yt_error(const yt_doc_t *doc, const yt_node_t *n, diag_list_t *d, const char *fmt, ...)
{
	char buf[768];
	va_list ap;
	va_start(ap, fmt);
	vsnprintf(buf, sizeof buf, fmt, ap);
	va_end(ap);
	diag_add(d, doc && doc->file ? doc->file : "", n ? n->line : 0, n ? n->col : 0, "%s", buf);
}

int yt_edit_distance(const char *a, const char *b, int cap)
{
	size_t la = strlen(a), lb = strlen(b);
	int prev[65], cur[65];
	/* The distance is at least the difference in length. */
	if (la > 64 || lb > 64 || (la > lb ? la - lb : lb - la) > (size_t)cap)
		return cap + 1;
	for (size_t j = 0; j <= lb; j++)
		prev[j] = (int)j;
	for (size_t i = 1; i <= la; i++) {
		int best;
		cur[0] = (int)i;
		best = cur[0];
		for (size_t j = 1; j <= lb; j++) {
			int sub = prev[j - 1] + (a[i - 1] != b[j - 1]);
			int del = prev[j] + 1, ins = cur[j - 1] + 1;
			cur[j] = sub < del ? (sub < ins ? sub : ins) : (del < ins ? del : ins);
			if (cur[j] < best)
				best = cur[j];
		}
		if (best > cap)
			return cap + 1;
		memcpy(prev, cur, (lb + 1) * sizeof prev[0]);
	}
	return prev[lb] > cap ? cap + 1 : prev[lb];
}

const char *yt_closest(const char *word, const char *const *words)
{
	const char *best = NULL;
	int best_d = 1000, ties = 0;
	size_t wl = strlen(word);
	int cap = wl <= 4 ? 1 : 2;
	/* A unit left off ("dose_max" for "dose_max_ml") is the commonest slip:
	 * a single allowed word that starts with this one wins. */
	if (wl >= 3) {
		const char *pre = NULL;
		int n_pre = 0;
		for (size_t i = 0; words[i]; i++)
			if (!strncmp(words[i], word, wl) && words[i][wl] != '\0') {
				pre = words[i];
				n_pre++;
			}
		if (n_pre == 1)
			return pre;
	}
	for (size_t i = 0; words[i]; i++) {
		int dist = yt_edit_distance(word, words[i], cap);
		if (dist > cap)
			continue;
		if (dist < best_d) {
			best = words[i];
			best_d = dist;
			ties = 0;
		} else if (dist == best_d) {
			ties++;
		}
	}
	return ties ? NULL : best;
}

static void join_words(char *out, size_t cap, const char *const *words)
{
	size_t used = 0;
	out[0] = '\0';
	for (size_t i = 0; words[i]; i++) {
		int w = snprintf(out + used, cap - used, "%s%s", i ? ", " : "", words[i]);
		if (w < 0 || (size_t)w >= cap - used)
			break;
		used += (size_t)w;
	}
}

bool yt_check_keys(const yt_doc_t *doc, const yt_node_t *m, const char *const *allowed,
                   const char *where, diag_list_t *d)
{
	bool ok = true;
	char list[512] = ""; /* the allowed words, joined once */
	if (!m || m->kind != YT_MAP)
		return true;
	for (size_t i = 0; i < m->n; i++) {
		const char *k = m->keys[i]->str;
		bool known = false;
		for (size_t j = 0; allowed[j]; j++)
			if (!strcmp(k, allowed[j]))
				known = true;
		if (known)
			continue;
		ok = false;
		const char *near = yt_closest(k, allowed);
		if (near) {
			yt_error(doc, m->keys[i], d, "unknown key '%s' in %s; did you mean '%s'?",
			         k, where, near);
		} else {
			if (!list[0])
				join_words(list, sizeof list, allowed);
			yt_error(doc, m->keys[i], d, "unknown key '%s' in %s (allowed: %s)", k,
			         where, list);
		}
	}
	return ok;
}

static const char *kind_name(const yt_node_t *n)
{
	if (n->kind == YT_MAP)
		return "a mapping";
	if (n->kind == YT_SEQ)
		return "a list";
	return "a single value";
}

bool yt_want_map(const yt_doc_t *doc, const yt_node_t *n, const char *what, diag_list_t *d)
{
	if (n && n->kind == YT_MAP)
		return true;
	if (!n || yt_is_null(n))
		yt_error(doc, n, d, "%s must be a mapping of keys (it is empty)", what);
	else
		yt_error(doc, n, d, "%s must be a mapping of keys (got %s)", what, kind_name(n));
	return false;
}

bool yt_want_seq(const yt_doc_t *doc, const yt_node_t *n, const char *what, diag_list_t *d)
{
	if (n && n->kind == YT_SEQ)
		return true;
	if (!n || yt_is_null(n))
		yt_error(doc, n, d, "%s must be a list (it is empty)", what);
	else
		yt_error(doc, n, d, "%s must be a list (got %s)", what, kind_name(n));
	return false;
}

void yt_missing(const yt_doc_t *doc, const yt_node_t *m, const char *key, const char *where,
                diag_list_t *d)
{
	yt_error(doc, m, d, "missing key '%s' in %s", key, where);
}

/* A plain scalar that is a value: not a collection, not null. Adds the
 * error and returns false otherwise. */
static bool want_value(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *expect,
                       diag_list_t *d)
{
	if (!n) {
		yt_error(doc, n, d, "%s: missing value (expected %s)", key, expect);
		return false;
	}
	if (n->kind != YT_SCALAR) {
		yt_error(doc, n, d, "%s must be %s (got %s)", key, expect, kind_name(n));
		return false;
	}
	if (yt_is_null(n)) {
		yt_error(doc, n, d, "%s has no value (expected %s)", key, expect);
		return false;
	}
	return true;
}

bool yt_double(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *unit,
               double *out, diag_list_t *d)
{
	char expect[96];
	bool has_unit = unit && *unit;
	double v;
	snprintf(expect, sizeof expect, "a number%s%s", has_unit ? " in " : "",
	         has_unit ? unit : "");
	if (!want_value(doc, n, key, expect, d))
		return false;
	if (!n->plain) {
		yt_error(doc, n, d, "%s must be %s, not a quoted string (got \"%s\")", key, expect,
		         n->str);
		return false;
	}
	if (!parse_decimal(n->str, &v)) {
		/* "25 mL", "25mL": a number followed by a unit. */
		char *end;
		double lead = strtod(n->str, &end);
		(void)lead;
		if (end != n->str && *end && has_unit)
			yt_error(doc, n, d,
			         "%s must be a number in %s, written without a unit (got \"%s\")",
			         key, unit, n->str);
		else
			yt_error(doc, n, d, "%s must be %s (got \"%s\")", key, expect, n->str);
		return false;
	}
	*out = v;
	return true;
}

bool yt_double_range(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *unit,
                     double lo, double hi, double *out, diag_list_t *d)
{
	double v;
	const char *u = unit && *unit ? unit : "";
	const char *sp = *u ? " " : "";
	if (!yt_double(doc, n, key, unit, &v, d))
		return false;
	if (v < lo || v > hi) {
		if (isinf(lo))
			yt_error(doc, n, d, "%s must be at most %g%s%s (got %g)", key, hi, sp, u,
			         v);
		else if (isinf(hi))
			yt_error(doc, n, d, "%s must be at least %g%s%s (got %g)", key, lo, sp, u,
			         v);
		else
			yt_error(doc, n, d, "%s must be between %g and %g%s%s (got %g)", key, lo,
			         hi, sp, u, v);
		return false;
	}
	*out = v;
	return true;
}

bool yt_long(const yt_doc_t *doc, const yt_node_t *n, const char *key, long lo, long hi, long *out,
             diag_list_t *d)
{
	const char *p;
	char *end;
	long v;
	if (!want_value(doc, n, key, "a whole number", d))
		return false;
	p = n->str;
	if (*p == '+' || *p == '-')
		p++;
	if (!n->plain || !*p || strspn(p, "0123456789") != strlen(p)) {
		yt_error(doc, n, d, "%s must be a whole number (got \"%s\")", key, n->str);
		return false;
	}
	errno = 0;
	v = strtol(n->str, &end, 10);
	if (errno == ERANGE || v < lo || v > hi) {
		yt_error(doc, n, d, "%s must be between %ld and %ld (got %s)", key, lo, hi, n->str);
		return false;
	}
	*out = v;
	return true;
}

bool yt_bool(const yt_doc_t *doc, const yt_node_t *n, const char *key, bool *out, diag_list_t *d)
{
	static const char *const yes[] = {"true", "True", "TRUE", NULL};
	static const char *const no[] = {"false", "False", "FALSE", NULL};
	if (!want_value(doc, n, key, "true or false", d))
		return false;
	for (int i = 0; n->plain && yes[i]; i++)
		if (!strcmp(n->str, yes[i])) {
			*out = true;
			return true;
		}
	for (int i = 0; n->plain && no[i]; i++)
		if (!strcmp(n->str, no[i])) {
			*out = false;
			return true;
		}
	yt_error(doc, n, d, "%s must be true or false (got \"%s\")", key, n->str);
	return false;
}

bool yt_bytes(const yt_doc_t *doc, const yt_node_t *n, const char *key, char *out, size_t cap,
              diag_list_t *d)
{
	if (!want_value(doc, n, key, "text", d))
		return false;
	if (n->len >= cap) {
		yt_error(doc, n, d, "%s is too long: %zu characters (at most %zu)", key, n->len,
		         cap - 1);
		return false;
	}
	memcpy(out, n->str, n->len + 1);
	return true;
}

bool yt_string(const yt_doc_t *doc, const yt_node_t *n, const char *key, char *out, size_t cap,
               diag_list_t *d)
{
	if (!want_value(doc, n, key, "text", d))
		return false;
	if (n->len >= cap) {
		yt_error(doc, n, d, "%s is too long: %zu characters (at most %zu)", key, n->len,
		         cap - 1);
		return false;
	}
	/* Text reaches records, logs and terminals: no control characters
	 * (text.h). Byte strings such as a pump's line ends have getters of
	 * their own. */
	size_t at = text_control_at(n->str, n->len, false);
	if (at != TEXT_NONE) {
		unsigned char c = (unsigned char)n->str[at];
		yt_error(doc, n, d,
		         "%s holds a control character (U+%04X); write the text without it", key,
		         c == 0xC2 ? (unsigned char)n->str[at + 1] : c);
		return false;
	}
	memcpy(out, n->str, n->len + 1);
	return true;
}

bool yt_enum(const yt_doc_t *doc, const yt_node_t *n, const char *key, const char *const *words,
             int *out, diag_list_t *d)
{
	char list[512];
	const char *near;
	char expect[560];
	join_words(list, sizeof list, words);
	snprintf(expect, sizeof expect, "one of %s", list);
	if (!want_value(doc, n, key, expect, d))
		return false;
	for (int i = 0; words[i]; i++)
		if (!strcmp(n->str, words[i])) {
			*out = i;
			return true;
		}
	near = yt_closest(n->str, words);
	if (near)
		yt_error(doc, n, d, "%s must be one of %s (got \"%s\"; did you mean '%s'?)", key,
		         list, n->str, near);
	else
		yt_error(doc, n, d, "%s must be one of %s (got \"%s\")", key, list, n->str);
	return false;
}

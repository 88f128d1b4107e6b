--[[
premises.lua: replace every premises code block by its generated
methods-and-diagnostics section.

The filter is thin on purpose: it collects the blocks, sends them in ONE request
to the Python package (`python -m premises filter`), and splices the Markdown it
gets back. Everything statistical happens in Python, so the filter and the
command line cannot drift apart.

Use it with plain pandoc:
    pandoc report.md --lua-filter "$(premises lua-filter)" -o report.html
or in Quarto through the extension (`premises quarto install`, then
`filters: [premises]`), which runs this same file at `pre-ast`.

Document metadata read here (under `premises:`):
    python    the interpreter that has premises installed
    on-error  `fail` (default: stop the render) or `warn` (a warning callout
              takes the block's place)
    flavor    the Markdown dialect asked for (default: quarto under Quarto,
              pandoc otherwise)

Protocol 1 (keep in step with premises/_version.py PROTOCOL_VERSION):
    request  Markdown on stdin; block N is a premises fence inside
             `::: {#premises-out-N}`
    reply    Markdown on stdout; div `premises-out-N` holds block N's section
    failure  non-zero exit; the message is on stdout
]]

PANDOC_VERSION:must_be_at_least '2.17'

local PROTOCOL = '1'
local OUT_PREFIX = 'premises-out-'
local BLOCK_CLASS = 'premises'
-- pandoc 2 reads ```{premises} as a code block with this class; Quarto would run it as code.
local EXECUTABLE_CLASS = '{premises}'

local under_quarto = type(quarto) == 'table'

local function trim(text)
  return (tostring(text or ''):gsub('^%s+', ''):gsub('%s+$', ''))
end

local function this_folder()
  -- Works when the file is loaded by pandoc and when another filter dofile()s it.
  local info = debug and debug.getinfo and debug.getinfo(1, 'S')
  local source = info and info.source or ''
  if source:sub(1, 1) == '@' then
    return pandoc.path.directory(source:sub(2))
  end
  if PANDOC_SCRIPT_FILE then
    return pandoc.path.directory(PANDOC_SCRIPT_FILE)
  end
  return nil
end

local function warn(message)
  if under_quarto and quarto.log and quarto.log.warning then
    quarto.log.warning(message)
  elseif pandoc.log and pandoc.log.warn then
    pandoc.log.warn(message)
  else
    io.stderr:write('[WARNING] ', message, '\n')
  end
end

local function settings(meta)
  local found = meta and meta.premises
  local function text(key)
    if type(found) ~= 'table' or found[key] == nil then
      return nil
    end
    local value = trim(pandoc.utils.stringify(found[key]))
    if value == '' then
      return nil
    end
    return value
  end
  local on_error = text('on-error') or 'fail'
  if on_error ~= 'fail' and on_error ~= 'warn' then
    error("premises: the metadata key 'premises.on-error' must be fail or warn; got '"
      .. on_error .. "'.", 0)
  end
  local default_python = pandoc.system.os == 'mingw32' and 'python' or 'python3'
  -- Only an interpreter path is taken from metadata, never a command line.
  local python = text('python') or os.getenv('PREMISES_PYTHON') or os.getenv('QUARTO_PYTHON')
    or default_python
  local flavor = text('flavor') or (under_quarto and 'quarto' or 'pandoc')
  return {python = python, on_error = on_error, flavor = flavor}
end

-- The document's folder (data paths and figures are relative to it) and its path.
local function locate_input()
  local cwd = pandoc.system.get_working_directory()
  local input
  if under_quarto and quarto.doc and quarto.doc.input_file then
    -- Under Quarto PANDOC_STATE names a temporary file; this is the real one.
    input = quarto.doc.input_file
  else
    input = PANDOC_STATE.input_files[1]
  end
  if input == nil or input == '-' then
    return cwd, '-'
  end
  local absolute = input
  if not pandoc.path.is_absolute(absolute) then
    absolute = pandoc.path.join({cwd, input})
  end
  return pandoc.path.directory(absolute), input
end

local function is_block(code)
  return code.classes:includes(BLOCK_CLASS) or code.classes:includes(EXECUTABLE_CLASS)
end

local function collect_blocks(doc)
  local blocks = pandoc.List()
  doc:walk({
    CodeBlock = function(code)
      if is_block(code) then
        blocks:insert(code)
      end
    end,
  })
  return blocks
end

local function warning_callout(message)
  return pandoc.Div({
    pandoc.Para({pandoc.Strong({pandoc.Str('premises could not render this block')})}),
    pandoc.Para({pandoc.Code(message)}),
  }, pandoc.Attr('', {'callout-warning'}))
end

local function check_fences(blocks, input)
  for _, code in ipairs(blocks) do
    if code.classes:includes(EXECUTABLE_CLASS) then
      return input .. ': a block fenced as ```{premises} would make Quarto run it as an '
        .. 'executable code cell. Write ```premises or ```{.premises} instead.'
    end
  end
  return nil
end

local function build_request(blocks)
  local divs = pandoc.List()
  for number, code in ipairs(blocks) do
    divs:insert(pandoc.Div({code}, pandoc.Attr(OUT_PREFIX .. number)))
  end
  return pandoc.write(pandoc.Pandoc(divs), 'markdown')
end

-- Run the package; return its stdout, or nil and the message to show.
local function call_package(options, request)
  local base_dir, input = locate_input()
  local args = {
    '-m', 'premises', 'filter',
    '--protocol', PROTOCOL,
    '--flavor', options.flavor,
    '--base-dir', base_dir,
    '--input', input,
    '--on-error', options.on_error,
  }
  local ok, result = pcall(pandoc.pipe, options.python, args, request)
  if ok then
    return result
  end
  if type(result) == 'table' and result.error_code then
    local message = trim(result.output)
    if message == '' then
      message = 'premises: ' .. options.python .. ' -m premises filter exited with status '
        .. tostring(result.error_code) .. '; its message is above.'
    end
    return nil, message
  end
  return nil, 'premises: could not run the interpreter "' .. options.python .. '" ('
    .. trim(tostring(result)) .. '). Install premises for it, or name the interpreter '
    .. 'that has premises with the metadata key premises.python or the environment '
    .. 'variable PREMISES_PYTHON.'
end

local function read_sections(reply, count)
  local sections = {}
  for _, block in ipairs(pandoc.read(reply, 'markdown').blocks) do
    if block.t == 'Div' then
      local number = tonumber(block.identifier:match('^premises%-out%-(%d+)$'))
      if number then
        sections[number] = block.content
      end
    end
  end
  for number = 1, count do
    if sections[number] == nil then
      return nil, 'premises: the reply of the premises package has no section for block '
        .. number .. ' (protocol ' .. PROTOCOL .. '). Check that the filter and the package '
        .. 'come from the same premises version (premises lua-filter, premises quarto install).'
    end
  end
  return sections
end

local function register_figures(sections)
  if not (under_quarto and quarto.doc and quarto.doc.add_resource) then
    return
  end
  -- Quarto finds most images itself; registering them also covers other formats.
  for _, blocks in pairs(sections) do
    pandoc.Div(blocks):walk({
      Image = function(image)
        local src = image.src
        if not src:match('^%a[%w+.-]*:') and not pandoc.path.is_absolute(src) then
          pcall(quarto.doc.add_resource, src)
        end
      end,
    })
  end
end

local function replace_blocks(doc, replacement)
  local number = 0
  return doc:walk({
    CodeBlock = function(code)
      if is_block(code) then
        number = number + 1
        return replacement(number)
      end
    end,
  })
end

local function load_references()
  if under_quarto then
    return nil -- Quarto numbers and links cross-references itself.
  end
  local folder = this_folder()
  if folder == nil then
    return nil
  end
  local path = pandoc.path.join({folder, 'premises-refs.lua'})
  local handle = io.open(path, 'r')
  if handle == nil then
    return nil
  end
  handle:close()
  local filters = dofile(path)
  return filters and filters[1] and filters[1].Pandoc
end

local function render(doc)
  local blocks = collect_blocks(doc)
  if #blocks == 0 then
    return nil -- untouched: byte-identical to a run without the filter
  end
  local options = settings(doc.meta)
  local _, input = locate_input()
  local message = check_fences(blocks, input)
  local sections
  if message == nil then
    local reply
    reply, message = call_package(options, build_request(blocks))
    if reply ~= nil then
      sections, message = read_sections(reply, #blocks)
    end
  end
  if message ~= nil then
    if options.on_error ~= 'warn' then
      error(message, 0)
    end
    warn(message)
    return replace_blocks(doc, function() return {warning_callout(message)} end)
  end
  register_figures(sections)
  doc = replace_blocks(doc, function(number) return sections[number] end)
  local references = load_references()
  if references then
    doc = references(doc) or doc
  end
  return doc
end

return {{Pandoc = render}}

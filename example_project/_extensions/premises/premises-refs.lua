--[[
premises-refs.lua: numbered figure and table references for plain pandoc.

Quarto numbers `#fig-...`/`#tbl-...` targets and resolves `@fig-...` references
itself. Plain pandoc does not, so outside Quarto this pass:

  * moves a trailing `{#tbl-x}` out of a table caption into the table's id
    (pandoc before 3.8.2 leaves it in the caption text);
  * numbers every figure and table whose id starts with `fig-` / `tbl-`, in
    document order, and puts "Figure N: " / "Table N: " before its caption
    (not for LaTeX, which numbers floats itself);
  * adds a raw `\label{id}` to table captions for LaTeX on pandoc 2 (pandoc 3
    writes it itself);
  * turns `@fig-x`, `[@fig-x]` and `-@fig-x` that name one of those ids into
    "Figure N" / "N" links (`Figure~\ref{fig-x}` in LaTeX). Citations of
    anything else are left for citeproc.

premises.lua runs it after splicing the sections; `premises render --to html`
runs it on the Markdown it writes. It can also be used on its own:
    pandoc doc.md --lua-filter premises-refs.lua -o doc.html
]]

PANDOC_VERSION:must_be_at_least '2.17'

local NAMES = {fig = 'Figure', tbl = 'Table'}
local NBSP = '\u{a0}'

local function is_latex()
  return FORMAT == 'latex' or FORMAT == 'beamer'
end

local function kind_of(identifier)
  local prefix = (identifier or ''):match('^(%a+)%-')
  if prefix and NAMES[prefix] then
    return prefix
  end
  return nil
end

-- pandoc < 3.8.2: `: Caption {#tbl-x}` keeps the braces in the caption text.
local function take_caption_id(inlines)
  local last = #inlines
  while last > 0 and (inlines[last].t == 'Space' or inlines[last].t == 'SoftBreak') do
    last = last - 1
  end
  for first = last, 1, -1 do
    local element = inlines[first]
    if element.t ~= 'Str' and element.t ~= 'Space' and element.t ~= 'SoftBreak' then
      return nil
    end
    if element.t == 'Str' and element.text:sub(1, 2) == '{#' then
      local text = pandoc.utils.stringify(pandoc.Span({table.unpack(inlines, first, last)}))
      local identifier = text:match('^{#([^%s}]+)[^}]*}$')
      if identifier == nil then
        return nil
      end
      local kept = pandoc.List({table.unpack(inlines, 1, first - 1)})
      while #kept > 0 and (kept[#kept].t == 'Space' or kept[#kept].t == 'SoftBreak') do
        kept:remove(#kept)
      end
      return identifier, kept
    end
  end
  return nil
end

local function caption_inlines(tbl)
  local long = tbl.caption and tbl.caption.long
  if long == nil or #long == 0 then
    return nil
  end
  local block = long[#long]
  if block.t == 'Plain' or block.t == 'Para' then
    return block
  end
  return nil
end

local function move_table_ids(doc)
  if PANDOC_VERSION >= '3.8.2' then
    return doc
  end
  return doc:walk({
    Table = function(tbl)
      if tbl.identifier ~= '' then
        return nil
      end
      local block = caption_inlines(tbl)
      if block == nil then
        return nil
      end
      local identifier, kept = take_caption_id(block.content)
      if identifier == nil then
        return nil
      end
      block.content = kept
      tbl.identifier = identifier
      return tbl
    end,
  })
end

-- pandoc 2 writes images as implicit figures: a paragraph holding one image titled "fig:".
local function implicit_figure(para)
  if #para.content == 1 and para.content[1].t == 'Image' then
    local image = para.content[1]
    if image.title:sub(1, 4) == 'fig:' then
      return image
    end
  end
  return nil
end

local function number_targets(doc)
  local numbers, counts = {}, {fig = 0, tbl = 0}
  local function add(identifier)
    local kind = kind_of(identifier)
    if kind and numbers[identifier] == nil then
      counts[kind] = counts[kind] + 1
      numbers[identifier] = {kind = kind, number = counts[kind]}
    end
  end
  doc:walk({
    traverse = 'topdown',
    Figure = function(figure) add(figure.identifier) end,
    Table = function(tbl) add(tbl.identifier) end,
    Div = function(div) add(div.identifier) end,
    Para = function(para)
      local image = implicit_figure(para)
      if image then
        add(image.identifier)
      end
    end,
  })
  return numbers
end

local function label_text(target)
  return NAMES[target.kind] .. NBSP .. tostring(target.number)
end

local function prefix_inlines(inlines, target)
  local prefixed = pandoc.List({pandoc.Str(label_text(target) .. ':'), pandoc.Space()})
  prefixed:extend(inlines)
  return prefixed
end

local function prefix_blocks(blocks, target)
  if #blocks > 0 and (blocks[1].t == 'Plain' or blocks[1].t == 'Para') then
    blocks[1].content = prefix_inlines(blocks[1].content, target)
  end
end

local function label_captions(doc, numbers)
  local latex, old = is_latex(), PANDOC_VERSION < '3'
  return doc:walk({
    Figure = function(figure)
      local target = numbers[figure.identifier]
      if target and not latex then
        prefix_blocks(figure.caption.long, target)
        return figure
      end
    end,
    Para = function(para)
      local image = implicit_figure(para)
      local target = image and numbers[image.identifier]
      if target and not latex then
        image.caption = prefix_inlines(image.caption, target)
        return para
      end
    end,
    Table = function(tbl)
      local target = numbers[tbl.identifier]
      local block = target and caption_inlines(tbl)
      if block == nil then
        return nil
      end
      if latex and old then
        block.content:insert(pandoc.RawInline('latex', '\\label{' .. tbl.identifier .. '}'))
      elseif not latex then
        block.content = prefix_inlines(block.content, target)
      end
      return tbl
    end,
  })
end

local function reference(citation, target)
  local bare = citation.mode == 'SuppressAuthor'
  if is_latex() then
    local text = '\\ref{' .. citation.id .. '}'
    if not bare then
      text = NAMES[target.kind] .. '~' .. text
    end
    return pandoc.RawInline('latex', text)
  end
  local text = bare and tostring(target.number) or label_text(target)
  return pandoc.Link({pandoc.Str(text)}, '#' .. citation.id)
end

local function resolve_cite(cite, numbers)
  for _, citation in ipairs(cite.citations) do
    if numbers[citation.id] == nil then
      return nil -- not (only) ours: leave the whole citation to citeproc
    end
  end
  local result = pandoc.List()
  local count = #cite.citations
  for index, citation in ipairs(cite.citations) do
    if index > 1 and index < count then
      result:extend({pandoc.Str(','), pandoc.Space()})
    elseif index > 1 then
      result:extend({pandoc.Space(), pandoc.Str('and'), pandoc.Space()})
    end
    if #citation.prefix > 0 then
      result:extend(citation.prefix)
      result:insert(pandoc.Space())
    end
    result:insert(reference(citation, numbers[citation.id]))
    result:extend(citation.suffix)
  end
  return result
end

local function resolve(doc)
  doc = move_table_ids(doc)
  local numbers = number_targets(doc)
  if next(numbers) == nil then
    return doc
  end
  doc = label_captions(doc, numbers)
  return doc:walk({
    Cite = function(cite) return resolve_cite(cite, numbers) end,
  })
end

return {{Pandoc = resolve}}
